"""Calibration: does a risk of 0.3 mean that about 3 in 10 such events are fraud?

`calibration_table` groups events by risk band and compares the mean risk of each band with the
share of fraud in it (a reliability diagram in numbers); `brier_score` is the mean squared error
of the risk as a probability (Brier, "Verification of forecasts expressed in terms of
probability", Monthly Weather Review 78(1), 1950). Against labels that cover only part of the
fraud, the observed shares are lower bounds: unlabelled events count as not fraud.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from scoring.evaluate_ranking import checked_columns

RISK_BANDS = (0.0, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 0.8, 1.0)
"""Default band edges: fine where most events are, coarse where few are."""


@dataclass(frozen=True)
class CalibrationBand:
    """Events with ``low <= risk < high`` (the last band includes 1.0)."""

    low: float
    high: float
    events: int
    mean_risk: float
    fraud_share: float


def brier_score(risk: npt.ArrayLike, is_fraud: npt.ArrayLike) -> float:
    """Mean of ``(risk - outcome) ** 2`` (0 is perfect; always saying the base rate p scores
    ``p (1 - p)``).

    >>> brier_score([0.0, 1.0, 0.5], [0, 1, 1])
    0.08333333333333333
    """
    r, y = checked_columns(risk, is_fraud)
    return float(np.mean((r - y) ** 2))


def calibration_table(
    risk: npt.ArrayLike, is_fraud: npt.ArrayLike, edges: Sequence[float] = RISK_BANDS
) -> list[CalibrationBand]:
    """Mean risk and fraud share per risk band (bands without events are left out).

    >>> [(b.events, b.mean_risk, b.fraud_share) for b in calibration_table(
    ...     [0.1, 0.2, 0.9, 0.95], [0, 1, 1, 1], edges=(0.0, 0.5, 1.0))]
    [(2, 0.15000000000000002, 0.5), (2, 0.925, 1.0)]
    """
    r, y = checked_columns(risk, is_fraud)
    cut = np.asarray(edges, dtype=np.float64)
    if cut.ndim != 1 or len(cut) < 2 or np.any(np.diff(cut) <= 0):
        raise ValueError("band edges must be an increasing sequence of at least two numbers")
    band = np.clip(np.searchsorted(cut, r, side="right") - 1, 0, len(cut) - 2)
    out = []
    for i in range(len(cut) - 1):
        inside = band == i
        n = int(inside.sum())
        if n:
            out.append(
                CalibrationBand(
                    float(cut[i]),
                    float(cut[i + 1]),
                    n,
                    float(r[inside].mean()),
                    float(y[inside].mean()),
                )
            )
    return out
