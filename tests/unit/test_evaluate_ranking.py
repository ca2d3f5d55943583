"""Ranking metrics checked against scikit-learn (the reference implementation), brute force and
published worked examples (tests/data/evaluate_ranking_cases.json, each row naming its source)."""

from __future__ import annotations

import itertools
import json
import math
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn import metrics

from scoring.evaluate import (
    alert_count,
    alert_weights,
    at_alert_count,
    at_alert_rate,
    at_threshold,
    average_precision,
    precision_recall_curve,
    roc_auc,
    top_mask,
)

CASES = json.loads((Path(__file__).parents[1] / "data" / "evaluate_ranking_cases.json").read_text())
METRICS = {"average_precision": average_precision, "roc_auc": roc_auc}


def _case_arrays(case: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    if "risk" in case:
        return np.asarray(case["risk"], float), np.asarray(case["is_fraud"])
    levels = np.asarray(case["risk_levels"], float)
    neg, pos = case["negatives_per_level"], case["positives_per_level"]
    risk = np.r_[np.repeat(levels, neg), np.repeat(levels, pos)]
    return risk, np.r_[np.zeros(sum(neg)), np.ones(sum(pos))]


@pytest.mark.parametrize("case", CASES, ids=[c["name"] for c in CASES])
def test_published_and_hand_worked_cases(case: dict[str, Any]) -> None:
    """Source: the row's `source` field."""
    risk, is_fraud = _case_arrays(case)
    got = METRICS[case["metric"]](risk, is_fraud)
    assert got == pytest.approx(case["expected"], abs=case.get("tolerance", 1e-12))


def _tied_data(seed: int, n: int, levels: int, prevalence: float) -> tuple[np.ndarray, np.ndarray]:
    """Random risks rounded to a few levels, so ties are frequent."""
    rng = np.random.default_rng(seed)
    is_fraud = rng.random(n) < prevalence
    risk = np.clip(rng.normal(0.3 + 0.3 * is_fraud, 0.2), 0, 1)
    return np.round(risk * levels) / levels, is_fraud


TIED = [(seed, n, levels) for seed in range(6) for n, levels in ((50, 5), (500, 20), (3000, 1000))]


@pytest.mark.parametrize(("seed", "n", "levels"), TIED)
def test_average_precision_equals_sklearn_with_ties(seed: int, n: int, levels: int) -> None:
    """Reference: sklearn.metrics.average_precision_score (step-wise, ties as one block)."""
    risk, is_fraud = _tied_data(seed, n, levels, 0.1)
    expected = metrics.average_precision_score(is_fraud, risk)
    assert average_precision(risk, is_fraud) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(("seed", "n", "levels"), TIED)
def test_roc_auc_equals_sklearn_with_ties(seed: int, n: int, levels: int) -> None:
    """Reference: sklearn.metrics.roc_auc_score (ties count one half)."""
    risk, is_fraud = _tied_data(seed, n, levels, 0.1)
    expected = metrics.roc_auc_score(is_fraud, risk)
    assert roc_auc(risk, is_fraud) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(("seed", "n", "levels"), TIED)
def test_precision_recall_curve_equals_sklearn(seed: int, n: int, levels: int) -> None:
    """Reference: sklearn.metrics.precision_recall_curve (same layout: thresholds increasing)."""
    risk, is_fraud = _tied_data(seed, n, levels, 0.1)
    want_p, want_r, want_t = metrics.precision_recall_curve(is_fraud, risk)
    got_p, got_r, got_t = precision_recall_curve(risk, is_fraud)
    np.testing.assert_allclose(got_t, want_t)
    np.testing.assert_allclose(got_p, want_p, rtol=1e-12)
    np.testing.assert_allclose(got_r, want_r, rtol=1e-12)


EDGE: dict[str, tuple[list[float], list[int]]] = {
    "single_fraud_top": ([0.9, 0.1, 0.2], [1, 0, 0]),
    "single_fraud_bottom": ([0.0, 0.1, 0.2], [1, 0, 0]),
    "one_of_each_tied": ([0.5, 0.5], [1, 0]),
    "all_fraud_but_one": ([0.3, 0.2, 0.1, 0.9], [1, 1, 1, 0]),
    "two_events": ([0.2, 0.8], [0, 1]),
    "integer_like_levels": ([0, 1, 2, 2, 1, 0], [0, 1, 1, 0, 0, 1]),
}


@pytest.mark.parametrize("name", list(EDGE))
def test_edge_cases_equal_sklearn(name: str) -> None:
    """Reference: sklearn average_precision_score and roc_auc_score on small edge cases."""
    risk, is_fraud = EDGE[name]
    assert average_precision(risk, is_fraud) == pytest.approx(
        metrics.average_precision_score(is_fraud, risk)
    )
    assert roc_auc(risk, is_fraud) == pytest.approx(metrics.roc_auc_score(is_fraud, risk))


def test_undefined_metrics_are_nan() -> None:
    """Without fraud, AP is NaN here where sklearn warns and returns 0.0: a score evaluated on no
    fraud has no precision to speak of, and 0.0 would read as a very bad score. AUC is NaN with
    one class, as in sklearn (which also warns). No events at all: NaN too."""
    assert math.isnan(average_precision([0.1, 0.2], [0, 0]))
    assert math.isnan(roc_auc([0.1, 0.2], [0, 0]))
    assert math.isnan(roc_auc([0.1, 0.2], [1, 1]))
    assert average_precision([0.1, 0.2], [1, 1]) == 1.0
    assert math.isnan(average_precision([], []))
    assert math.isnan(roc_auc([], []))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert metrics.average_precision_score([0, 0], [0.1, 0.2]) == 0.0


def test_bad_input_messages() -> None:
    with pytest.raises(ValueError, match=r"not finite.*position 1"):
        average_precision([0.1, float("nan")], [0, 1])
    with pytest.raises(ValueError, match="3 values"):
        roc_auc([0.1, 0.2, 0.3], [0, 1])
    with pytest.raises(ValueError, match="0/1"):
        roc_auc([0.1, 0.2], [0, 2])
    with pytest.raises(ValueError, match="between 0 and 1"):
        at_alert_rate([0.1], [1], 1.5)
    with pytest.raises(ValueError, match="between 0 and 2"):
        at_alert_count([0.1, 0.2], [1, 0], 3)


# --- alerting at a rate ---------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("rate", [0.001, 0.01, 0.05, 0.2, 0.5, 1.0])
def test_at_alert_rate_matches_sklearn_curve_point(seed: int, rate: float) -> None:
    """Reference: sklearn.metrics.precision_recall_curve. With ties included, the threshold is
    the k-th largest risk, one of the curve's thresholds, and precision/recall equal the curve's
    values at that threshold."""
    risk, is_fraud = _tied_data(seed, 2000, 50, 0.05)
    result = at_alert_rate(risk, is_fraud, rate)
    want_p, want_r, want_t = metrics.precision_recall_curve(is_fraud, risk)
    where = int(np.flatnonzero(want_t == result.threshold)[0])
    assert result.precision == pytest.approx(want_p[where])
    assert result.recall == pytest.approx(want_r[where])
    k = alert_count(rate, risk.size)
    assert result.alerts >= k
    assert result.alert_rate == result.alerts / risk.size
    assert result.requested_rate == rate


def test_at_alert_rate_brute_force_without_ties() -> None:
    """Reference: brute force, sorting the events and taking the first k."""
    rng = np.random.default_rng(7)
    risk, is_fraud = rng.random(1000), rng.random(1000) < 0.1
    for rate in (0.003, 0.01, 0.1):
        k = math.ceil(rate * 1000)
        top = np.argsort(-risk)[:k]
        result = at_alert_rate(risk, is_fraud, rate)
        assert result.alerts == k
        assert result.true_positives == is_fraud[top].sum()
        assert result.recall == pytest.approx(is_fraud[top].sum() / is_fraud.sum())
        assert result.threshold == risk[top].min()


def test_share_tie_rule_is_mean_over_every_order_of_the_tied_events() -> None:
    """Reference: brute force over all orderings of the tied block at the cut."""
    risk = np.array([0.9, 0.5, 0.5, 0.5, 0.5, 0.1])
    is_fraud = np.array([0, 1, 0, 1, 1, 1])
    tied = [1, 2, 3, 4]
    for k in range(1, 6):
        outcomes = []
        for order in itertools.permutations(tied):
            ranked = [0, *order, 5]
            outcomes.append(is_fraud[ranked[:k]].sum())
        result = at_alert_count(risk, is_fraud, k, ties="share")
        assert result.alerts == k
        assert result.true_positives == pytest.approx(np.mean(outcomes))
        assert result.precision == pytest.approx(np.mean(outcomes) / k)


def test_include_tie_rule_reports_realised_rate_above_the_request() -> None:
    """Regression: ties at the cut are all alerted and the realised rate says so."""
    result = at_alert_rate([0.5] * 10, [1] + [0] * 9, 0.1)
    assert result.alerts == 10
    assert result.alert_rate == 1.0
    assert result.requested_rate == 0.1


def test_zero_rate_alerts_nothing() -> None:
    result = at_alert_rate([0.2, 0.4], [1, 0], 0.0)
    assert (result.alerts, result.recall, result.threshold) == (0.0, 0.0, math.inf)
    assert math.isnan(result.precision)


@pytest.mark.parametrize(
    ("rate", "n", "expected"),
    [(0.07, 100, 7), (0.01, 1000, 10), (0.001, 10, 1), (0.5, 3, 2), (1.0, 5, 5), (0.0, 5, 0)],
)
def test_alert_count_is_ceiling_without_binary_rounding_surprises(
    rate: float, n: int, expected: int
) -> None:
    """Regression: 0.07 x 100 is 7.000000000000001 in binary floating point, which a bare
    ceiling turns into 8 alerts."""
    assert alert_count(rate, n) == expected


def test_at_threshold_and_top_mask_agree() -> None:
    risk, is_fraud = _tied_data(3, 400, 10, 0.2)
    by_count = at_alert_count(risk, is_fraud, 37)
    mask = top_mask(risk, 37)
    assert mask.sum() == by_count.alerts
    assert at_threshold(risk, is_fraud, by_count.threshold) == by_count


# --- properties -----------------------------------------------------------------------------

scores = st.lists(st.tuples(st.integers(0, 20), st.booleans()), min_size=2, max_size=60).filter(
    lambda rows: 0 < sum(f for _, f in rows) < len(rows)
)


@settings(max_examples=200, deadline=None)
@given(rows=scores)
def test_metrics_invariant_under_monotone_transform(rows: list[tuple[int, bool]]) -> None:
    """Property: AP and AUC depend on the order of risks only (ties included)."""
    risk = np.array([r for r, _ in rows], float) / 20
    is_fraud = np.array([f for _, f in rows])
    warped = np.exp(3 * risk) - 7
    assert average_precision(warped, is_fraud) == pytest.approx(average_precision(risk, is_fraud))
    assert roc_auc(warped, is_fraud) == pytest.approx(roc_auc(risk, is_fraud))


@settings(max_examples=200, deadline=None)
@given(rows=scores)
def test_auc_of_reversed_risk_is_one_minus_auc(rows: list[tuple[int, bool]]) -> None:
    """Property: reversing the ranking swaps who outranks whom; ties stay one half."""
    risk = np.array([r for r, _ in rows], float) / 20
    is_fraud = np.array([f for _, f in rows])
    assert roc_auc(1 - risk, is_fraud) == pytest.approx(1 - roc_auc(risk, is_fraud))


@settings(max_examples=200, deadline=None)
@given(rows=scores)
def test_metrics_equal_sklearn_on_random_small_inputs(rows: list[tuple[int, bool]]) -> None:
    """Reference: sklearn average_precision_score and roc_auc_score."""
    risk = np.array([r for r, _ in rows], float) / 20
    is_fraud = np.array([f for _, f in rows])
    ap = average_precision(risk, is_fraud)
    assert ap == pytest.approx(metrics.average_precision_score(is_fraud, risk))
    assert roc_auc(risk, is_fraud) == pytest.approx(metrics.roc_auc_score(is_fraud, risk))
    assert 0.0 <= ap <= 1.0


@pytest.mark.parametrize("k", [0, 1, 7, 40, 200])
def test_alert_weights_give_the_share_rule_expectations(k: int) -> None:
    """Reference: at_alert_count(ties="share"), itself checked by brute force above."""
    risk, is_fraud = _tied_data(11, 200, 8, 0.2)
    weights = alert_weights(risk, k)
    shared = at_alert_count(risk, is_fraud, k, ties="share")
    assert weights.sum() == pytest.approx(k)
    assert (weights * is_fraud).sum() == pytest.approx(shared.true_positives)
    assert ((weights >= 0) & (weights <= 1)).all()


def test_unknown_tie_rule_is_refused() -> None:
    with pytest.raises(ValueError, match="ties must be one of include, share"):
        at_alert_count([0.1, 0.2], [0, 1], 1, ties="random")  # type: ignore[arg-type]
