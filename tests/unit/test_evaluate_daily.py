"""Per-day queue precision and capacity thresholds, checked against brute force (a plain loop
over days and over every candidate threshold) and against Python's datetime for day numbers."""

from __future__ import annotations

import itertools
import math
from datetime import UTC, date, datetime

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from scoring.evaluate import (
    capacity_table,
    daily_counts,
    precision_at_k_per_day,
    threshold_for_capacity,
    utc_day,
)
from scoring.evaluate_daily import VolumeStatistic


def _data(seed: int, n: int, days: int, levels: int | None) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    risk = rng.random(n)
    if levels:
        risk = np.round(risk * levels) / levels
    return risk, rng.random(n) < 0.2 * risk + 0.02, rng.integers(100, 100 + days, n)


@pytest.mark.parametrize("ts_s", [0, 1, 86_399.999, 86_400, -0.5, 1_700_000_000, 4_102_444_800])
def test_utc_day_matches_datetime(ts_s: float) -> None:
    """Reference: Python's datetime, UTC calendar date of an epoch time."""
    expected = (
        datetime.fromtimestamp(ts_s, tz=UTC).date().toordinal() - date(1970, 1, 1).toordinal()
    )
    assert utc_day([ts_s]).tolist() == [expected]


def test_daily_counts_fill_empty_days() -> None:
    days, counts = daily_counts([5, 9, 9, 5, 7], [True, True, True, False, False])
    assert days.tolist() == [5, 6, 7, 8, 9]
    assert counts.tolist() == [1, 0, 0, 0, 2]


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("k", [1, 3, 10, 50])
def test_precision_at_k_per_day_brute_force_without_ties(seed: int, k: int) -> None:
    """Reference: brute force, one day at a time, sorting by risk and taking the first k."""
    risk, is_fraud, day = _data(seed, 300, 12, None)
    result = precision_at_k_per_day(risk, is_fraud, day, k)
    expected = []
    for d in sorted(set(day.tolist())):
        members = np.flatnonzero(day == d)
        top = members[np.argsort(-risk[members])][:k]
        expected.append(is_fraud[top].mean())
    assert result.days.tolist() == sorted(set(day.tolist()))
    np.testing.assert_allclose(result.precision, expected)
    assert result.mean == pytest.approx(np.mean(expected))


def test_precision_at_k_per_day_ties_are_expected_value_over_orders() -> None:
    """Reference: brute force over every ordering of each day's events (small days)."""
    risk = np.array([0.5, 0.5, 0.5, 0.2, 0.9, 0.4, 0.4, 0.4])
    is_fraud = np.array([1, 0, 0, 1, 0, 1, 1, 0])
    day = np.array([1, 1, 1, 1, 2, 2, 2, 2])
    for k in (1, 2, 3, 4, 6):
        result = precision_at_k_per_day(risk, is_fraud, day, k)
        for i, d in enumerate((1, 2)):
            members = np.flatnonzero(day == d)
            outcomes = [
                is_fraud[list(order)[: min(k, 4)]].mean()
                for order in itertools.permutations(members)
                if list(risk[list(order)]) == sorted(risk[members], reverse=True)
            ]
            assert result.precision[i] == pytest.approx(np.mean(outcomes)), (k, d)


def test_precision_at_k_short_day_queues_everything() -> None:
    result = precision_at_k_per_day([0.3, 0.1, 0.9], [1, 0, 1], [0, 0, 1], 5)
    assert result.queue.tolist() == [2, 1]
    assert result.precision.tolist() == [0.5, 1.0]


def test_precision_at_k_rejects_empty_queue() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        precision_at_k_per_day([0.1], [0], [0], 0)


def _brute_threshold(risk: np.ndarray, day: np.ndarray, per_day: float, statistic: str) -> float:
    first, last = day.min(), day.max()
    best = math.inf
    for t in sorted(set(risk.tolist()), reverse=True):
        counts = [np.sum((risk >= t) & (day == d)) for d in range(first, last + 1)]
        value = np.mean(counts) if statistic == "mean" else np.quantile(counts, 0.9)
        if value <= per_day:
            best = t
    return best


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("statistic", ["mean", "p90"])
@pytest.mark.parametrize("per_day", [0, 1, 2.5, 7, 40])
def test_threshold_for_capacity_brute_force(
    seed: int, statistic: VolumeStatistic, per_day: float
) -> None:
    """Reference: brute force over every distinct risk as a threshold, keeping the lowest whose
    daily volume statistic fits (numpy quantile for p90, days without events counted as zero)."""
    risk, is_fraud, day = _data(seed, 200, 9, 40)
    day[day == 103] = 104  # one day without events inside the period
    result = threshold_for_capacity(risk, day, per_day, is_fraud=is_fraud, statistic=statistic)
    assert result.threshold == _brute_threshold(risk, day, per_day, statistic)
    alerted = risk >= result.threshold
    assert result.alerts == alerted.sum()
    volume = result.mean_per_day if statistic == "mean" else result.p90_per_day
    assert volume <= per_day
    if alerted.any():
        assert result.precision == pytest.approx(is_fraud[alerted].mean())
    assert result.recall == pytest.approx(is_fraud[alerted].sum() / is_fraud.sum())


def test_capacity_below_the_busiest_top_event_alerts_nothing() -> None:
    result = threshold_for_capacity([0.9, 0.8], [0, 0], 0.5, statistic="mean")
    assert result.threshold == math.inf
    assert result.alerts == 0
    assert math.isnan(result.precision)


def test_capacity_table_thresholds_fall_as_capacity_grows() -> None:
    risk, is_fraud, day = _data(1, 500, 10, None)
    rows = capacity_table(risk, day, [1, 5, 20, 60], is_fraud=is_fraud)
    thresholds = [row.threshold for row in rows]
    assert thresholds == sorted(thresholds, reverse=True)
    assert [row.statistic for row in rows] == ["p90"] * 4


def test_capacity_bad_input() -> None:
    with pytest.raises(ValueError, match="zero or more"):
        threshold_for_capacity([0.1], [0], -1)
    with pytest.raises(ValueError, match="integer day numbers"):
        threshold_for_capacity([0.1], [0.5], 1)
    with pytest.raises(ValueError, match="no events"):
        threshold_for_capacity([], np.zeros(0, dtype=int), 1)


@settings(max_examples=150, deadline=None)
@given(
    rows=st.lists(st.tuples(st.integers(0, 10), st.integers(0, 4)), min_size=1, max_size=40),
    per_day=st.integers(0, 12),
    statistic=st.sampled_from(["mean", "p90"]),
)
def test_capacity_threshold_is_lowest_that_fits(
    rows: list[tuple[int, int]], per_day: int, statistic: VolumeStatistic
) -> None:
    """Property: the chosen threshold fits, and the next lower distinct risk does not."""
    risk = np.array([r for r, _ in rows], float) / 10
    day = np.array([d for _, d in rows])
    result = threshold_for_capacity(risk, day, per_day, statistic=statistic)
    assert result.threshold == _brute_threshold(risk, day, per_day, statistic)
