"""Alerting on a risk column: at a threshold, at an alert count or at an alert rate.

Each result says how many events are alerted, the realised alert rate, recall and precision.
Where risks tie at the cut, the tie rule is explicit: alert every tied event ("include"), or
give the tied events an even share of the remaining places ("share", expected counts).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
import numpy.typing as npt

from scoring.evaluate_ranking import BoolArray, FloatArray, as_risk, checked_columns

TieRule = Literal["include", "share"]
TIE_RULES = ("include", "share")


@dataclass(frozen=True)
class AlertResult:
    """What alerting on a risk threshold yields.

    Attributes
    ----------
    requested_rate
        The share of events asked for; None when a threshold or a count was given directly.
    threshold
        Events with risk >= it are alerted; inf when nothing is.
    alerts, alert_rate
        How many events are alerted, and their share of all events (the realised rate).
    true_positives
        Fraud among the alerts. Under the "share" tie rule this and `alerts` are expected
        counts and may be fractional.
    recall, precision
        Share of fraud alerted (NaN without fraud); share of alerts that are fraud (NaN
        without alerts).

    Examples
    --------
    >>> result = at_threshold([0.2, 0.9], [0, 1], 0.5)
    >>> result.alerts, result.alert_rate, result.recall, result.precision
    (1.0, 0.5, 1.0, 1.0)
    """

    requested_rate: float | None
    threshold: float
    alerts: float
    alert_rate: float
    true_positives: float
    recall: float
    precision: float


def _result(
    rate: float | None, threshold: float, alerts: float, true_pos: float, n: int, fraud: int
) -> AlertResult:
    return AlertResult(
        requested_rate=rate,
        threshold=threshold,
        alerts=alerts,
        alert_rate=alerts / n if n else math.nan,
        true_positives=true_pos,
        recall=true_pos / fraud if fraud else math.nan,
        precision=true_pos / alerts if alerts else math.nan,
    )


def at_threshold(risk: npt.ArrayLike, is_fraud: npt.ArrayLike, threshold: float) -> AlertResult:
    """Alert every event with risk >= `threshold`.

    Parameters
    ----------
    risk, is_fraud
        One risk and one fraud flag per event.
    threshold
        The lowest risk that is alerted.

    Returns
    -------
    AlertResult

    Examples
    --------
    >>> r = at_threshold([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1], 0.35)
    >>> r.alerts, r.recall, round(r.precision, 3)
    (3.0, 1.0, 0.667)
    """
    values, flags = checked_columns(risk, is_fraud)
    alerted = values >= threshold
    true_pos = float(np.count_nonzero(alerted & flags))
    fraud = int(np.count_nonzero(flags))
    return _result(None, threshold, float(np.count_nonzero(alerted)), true_pos, values.size, fraud)


def alert_count(rate: float, n: int) -> int:
    """Number of alerts for an alert rate: ceil(rate x n), so a positive rate alerts at least one.

    Parameters
    ----------
    rate
        Share of events to alert, between 0 and 1.
    n
        Number of events.

    Returns
    -------
    int

    Examples
    --------
    >>> alert_count(0.01, 1000), alert_count(0.001, 10), alert_count(0.0, 10)
    (10, 1, 0)
    """
    if not 0.0 <= rate <= 1.0:
        raise ValueError(f"alert rate must be between 0 and 1, got {rate}")
    # Rounding first keeps 0.07 x 100 (7.000000000000001 in binary) at 7 alerts, not 8.
    return min(n, math.ceil(round(rate * n, 9)))


def at_alert_count(
    risk: npt.ArrayLike, is_fraud: npt.ArrayLike, k: int, *, ties: TieRule = "include"
) -> AlertResult:
    """Alert the `k` highest-risk events; the threshold is the k-th largest risk.

    Parameters
    ----------
    risk, is_fraud
        One risk and one fraud flag per event.
    k
        Number of events to alert, from 0 to the number of events.
    ties
        ``"include"``: every event tied with the k-th largest risk is alerted, so the realised
        count may exceed `k`. ``"share"``: exactly `k` are alerted and the events tied at the
        cut share the remaining places evenly, so the counts are the expected values of
        picking among them at random (fractional). Both agree without a tie at the cut.

    Returns
    -------
    AlertResult

    Examples
    --------
    >>> r = at_alert_count([0.9, 0.5, 0.5, 0.1], [1, 1, 0, 0], 2)
    >>> r.threshold, r.alerts, r.true_positives
    (0.5, 3.0, 2.0)
    >>> at_alert_count([0.9, 0.5, 0.5, 0.1], [1, 1, 0, 0], 2, ties="share").true_positives
    1.5
    """
    if ties not in TIE_RULES:
        raise ValueError(f"ties must be one of {', '.join(TIE_RULES)}, got {ties!r}")
    values, flags = checked_columns(risk, is_fraud)
    n, fraud = values.size, int(np.count_nonzero(flags))
    if not 0 <= k <= n:
        raise ValueError(f"alert count must be between 0 and {n} (the number of events), got {k}")
    if k == 0:
        return _result(None, math.inf, 0.0, 0.0, n, fraud)
    threshold = float(np.partition(values, n - k)[n - k])
    if ties == "include":
        return at_threshold(values, flags, threshold)
    above, tied = values > threshold, values == threshold
    share = (k - np.count_nonzero(above)) / np.count_nonzero(tied)
    true_pos = np.count_nonzero(above & flags) + share * np.count_nonzero(tied & flags)
    return _result(None, threshold, float(k), float(true_pos), n, fraud)


def at_alert_rate(
    risk: npt.ArrayLike, is_fraud: npt.ArrayLike, rate: float, *, ties: TieRule = "include"
) -> AlertResult:
    """Alert the top `rate` share of events: k = ceil(rate x n), then as `at_alert_count`.

    Parameters
    ----------
    risk, is_fraud
        One risk and one fraud flag per event.
    rate
        Share of events to alert, between 0 and 1.
    ties
        The tie rule of `at_alert_count`. With the default, ``"include"``, the realised
        `alert_rate` may exceed `rate` when risks tie at the cut; it is reported beside it.

    Returns
    -------
    AlertResult

    Examples
    --------
    >>> r = at_alert_rate([0.9, 0.2, 0.7, 0.1, 0.3], [1, 0, 0, 0, 1], 0.4)
    >>> r.threshold, r.alerts, r.alert_rate, r.recall, r.precision
    (0.7, 2.0, 0.4, 0.5, 0.5)
    """
    values = as_risk(risk)
    result = at_alert_count(values, is_fraud, alert_count(rate, values.size), ties=ties)
    return replace(result, requested_rate=rate)


def top_mask(risk: npt.ArrayLike, k: int) -> BoolArray:
    """Which events are alerted when alerting the top `k`, ties at the cut included.

    Parameters
    ----------
    risk
        One risk per event.
    k
        Number of events to alert.

    Returns
    -------
    numpy.ndarray
        One boolean per event; at least `k` are True.

    Examples
    --------
    >>> top_mask([0.9, 0.5, 0.5, 0.1], 2).tolist()
    [True, True, True, False]
    """
    values = as_risk(risk)
    if not 0 <= k <= values.size:
        raise ValueError(f"alert count must be between 0 and {values.size}, got {k}")
    if k == 0:
        return np.zeros(values.size, dtype=np.bool_)
    cut = float(np.partition(values, values.size - k)[values.size - k])
    return np.asarray(values >= cut, dtype=np.bool_)


def alert_weights(risk: npt.ArrayLike, k: int) -> FloatArray:
    """Chance that each event is among `k` alerts under the "share" tie rule.

    Parameters
    ----------
    risk
        One risk per event.
    k
        Number of events to alert.

    Returns
    -------
    numpy.ndarray
        1 above the cut, 0 below, and for the events tied at the cut their share of the
        remaining places. Summed over a group of events, the expected number alerted in it.

    Examples
    --------
    >>> alert_weights([0.9, 0.5, 0.5, 0.1], 2).tolist()
    [1.0, 0.5, 0.5, 0.0]
    """
    values = as_risk(risk)
    mask = top_mask(values, k)
    weights = mask.astype(np.float64)
    if k == 0:
        return weights
    cut = float(values[mask].min())
    tied = values == cut
    weights[tied] = (k - np.count_nonzero(values > cut)) / np.count_nonzero(tied)
    return weights
