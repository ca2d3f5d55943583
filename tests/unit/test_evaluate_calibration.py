"""Calibration figures checked against scikit-learn's `calibration_curve` and `brier_score_loss`
(the reference implementations), on random data."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss

from scoring.evaluate import brier_score, calibration_table


@pytest.mark.parametrize("seed", range(5))
def test_brier_score_equals_scikit_learn(seed: int) -> None:
    rng = np.random.default_rng(seed)
    risk = rng.random(2000)
    fraud = rng.random(2000) < risk  # calibrated by construction
    assert brier_score(risk, fraud) == pytest.approx(brier_score_loss(fraud, risk), rel=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_bands_equal_scikit_learn_uniform_bins(seed: int) -> None:
    rng = np.random.default_rng(seed)
    risk = rng.random(3000) ** 3  # most events at low risk, as in practice
    fraud = rng.random(3000) < risk
    edges = np.linspace(0.0, 1.0, 11)
    share, mean = calibration_curve(fraud, risk, n_bins=10, strategy="uniform")
    bands = calibration_table(risk, fraud, edges=edges)
    np.testing.assert_allclose([b.fraud_share for b in bands], share, rtol=1e-12)
    np.testing.assert_allclose([b.mean_risk for b in bands], mean, rtol=1e-12)
    assert sum(b.events for b in bands) == 3000


def test_calibrated_scores_look_calibrated() -> None:
    """Outcomes drawn with the stated probabilities: each band's share is near its mean risk."""
    rng = np.random.default_rng(9)
    risk = rng.random(200_000)
    fraud = rng.random(200_000) < risk
    for band in calibration_table(risk, fraud):
        # binomial standard error of the share, times 5
        assert abs(band.fraud_share - band.mean_risk) < 5 * np.sqrt(0.25 / band.events) + 1e-3


def test_bad_edges_are_refused() -> None:
    with pytest.raises(ValueError, match="increasing"):
        calibration_table([0.5], [1], edges=(0.5, 0.2))
