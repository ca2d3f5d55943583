"""Per-day figures: a reviewer's daily queue, and thresholds that fit a review capacity.

`day` is an integer day number per event, such as `utc_day(ts_s)`. The period runs from the first
to the last day number, and a day inside it without events counts as a day with no alerts.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt

from scoring.evaluate_ranking import BoolArray, FloatArray, IntArray, as_flags, as_risk

SECONDS_PER_DAY = 86_400
VolumeStatistic = Literal["mean", "p90"]


def utc_day(ts_s: npt.ArrayLike) -> IntArray:
    """UTC calendar day number (days since 1970-01-01) of each epoch-seconds time.

    Parameters
    ----------
    ts_s
        Times in seconds since the epoch.

    Returns
    -------
    numpy.ndarray
        Integer day numbers; times before the epoch give negative days.

    Examples
    --------
    >>> utc_day([0, 86_399.5, 86_400, -1]).tolist()
    [0, 0, 1, -1]
    """
    return np.floor_divide(as_risk(ts_s, "ts_s"), SECONDS_PER_DAY).astype(np.int64)


def as_days(day: npt.ArrayLike, size: int) -> IntArray:
    """Check and convert a day-number column of the given length.

    Parameters
    ----------
    day
        Integer day numbers, one per event.
    size
        The number of events the column must have.

    Returns
    -------
    numpy.ndarray
        The day numbers as int64.

    Examples
    --------
    >>> as_days([3, 4], 2).tolist()
    [3, 4]
    """
    values = np.asarray(day)
    if values.ndim != 1 or values.shape[0] != size:
        raise ValueError(f"day must be one-dimensional with {size} values, got {values.shape}")
    if values.size and not np.issubdtype(values.dtype, np.integer):
        raise ValueError(f"day must hold integer day numbers, got {values.dtype}")
    return values.astype(np.int64)


def daily_counts(day: npt.ArrayLike, flagged: npt.ArrayLike) -> tuple[IntArray, IntArray]:
    """Flagged events per day over the whole period, days without events included as zero.

    Parameters
    ----------
    day
        Integer day number per event.
    flagged
        One flag per event (for example, alerted).

    Returns
    -------
    days, counts : numpy.ndarray
        Every day number from the first to the last, and the flagged events on each.

    Examples
    --------
    >>> days, counts = daily_counts([10, 10, 12], [True, True, False])
    >>> days.tolist(), counts.tolist()
    ([10, 11, 12], [2, 0, 0])
    """
    flags = np.asarray(flagged, dtype=np.bool_)
    days = as_days(day, flags.shape[0])
    if days.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    first = int(days.min())
    counts = np.bincount(days - first, weights=flags, minlength=int(days.max()) - first + 1)
    return np.arange(first, first + counts.size, dtype=np.int64), counts.astype(np.int64)


@dataclass(frozen=True)
class DailyPrecision:
    """Precision of each day's queue of the top k.

    Attributes
    ----------
    days
        The day numbers that have events, in order.
    queue
        The queue length of each day: k, or fewer on a day with fewer events.
    precision
        Share of each day's queue that is fraud (an expected value where ties share places).
    mean
        The unweighted mean of `precision` over days; NaN without events.

    Examples
    --------
    >>> precision_at_k_per_day([0.9, 0.1], [1, 0], [5, 5], 1).mean
    1.0
    """

    days: IntArray
    queue: IntArray
    precision: FloatArray
    mean: float


def precision_at_k_per_day(
    risk: npt.ArrayLike, is_fraud: npt.ArrayLike, day: npt.ArrayLike, k: int
) -> DailyPrecision:
    """Precision of the k highest-risk events of each day: a reviewer's daily queue of k cases.

    Parameters
    ----------
    risk, is_fraud
        One risk and one fraud flag per event.
    day
        Integer day number per event.
    k
        The queue length per day, at least 1.

    Returns
    -------
    DailyPrecision
        Only days that have events are listed; a day with fewer than k events queues them all.
        Tie rule: events tied with the k-th largest risk of a day share that day's remaining
        places evenly, so precision is its expected value when the queue picks among them at
        random.

    Examples
    --------
    >>> r = precision_at_k_per_day([0.9, 0.8, 0.1, 0.7, 0.6], [1, 0, 1, 0, 0], [0, 0, 0, 1, 1], 2)
    >>> r.days.tolist(), r.queue.tolist(), r.precision.tolist(), r.mean
    ([0, 1], [2, 2], [0.5, 0.0], 0.25)
    """
    if k < 1:
        raise ValueError(f"k (queue length per day) must be at least 1, got {k}")
    values = as_risk(risk)
    flags = as_flags(is_fraud, values.size)
    days, which = np.unique(as_days(day, values.size), return_inverse=True)
    per_day = np.bincount(which, minlength=days.size)
    queue = np.minimum(k, per_day)
    order = np.lexsort((-values, which))
    starts = np.r_[0, np.cumsum(per_day)[:-1]].astype(np.int64)
    cut = values[order][starts + queue - 1][which]
    above, tied = values > cut, values == cut

    def by_day(mask: BoolArray) -> FloatArray:
        return np.bincount(which, weights=mask, minlength=days.size).astype(np.float64)

    share = (queue - by_day(above)) / by_day(tied)
    true_pos = by_day(above & flags) + share * by_day(tied & flags)
    precision = true_pos / queue if days.size else np.zeros(0)
    mean = float(precision.mean()) if days.size else math.nan
    return DailyPrecision(days.astype(np.int64), queue.astype(np.int64), precision, mean)


@dataclass(frozen=True)
class CapacityThreshold:
    """The lowest threshold whose daily alert volume fits `per_day` reviews.

    Attributes
    ----------
    per_day, statistic
        The review capacity per day, and which daily volume must fit it ("p90" or "mean").
    threshold
        Events with risk >= it are alerted; inf when even the highest risk alone is too many.
    alerts, alert_rate
        Alerts over the whole period, and their share of events.
    mean_per_day, p90_per_day, max_per_day
        Daily alert volumes over the whole period (days without events count as 0).
    recall, precision
        At the threshold; NaN when no outcomes were given.

    Examples
    --------
    >>> threshold_for_capacity([0.9, 0.5, 0.1], [0, 0, 0], 1).threshold
    0.9
    """

    per_day: float
    statistic: VolumeStatistic
    threshold: float
    alerts: int
    alert_rate: float
    mean_per_day: float
    p90_per_day: float
    max_per_day: int
    recall: float
    precision: float


def _volume(counts: FloatArray, statistic: VolumeStatistic) -> float:
    # numpy's default quantile (linear interpolation between order statistics) for p90.
    return float(counts.mean() if statistic == "mean" else np.quantile(counts, 0.9))


def _counts_at(values: FloatArray, offset: IntArray, n_days: int, threshold: float) -> FloatArray:
    return np.bincount(offset, weights=values >= threshold, minlength=n_days).astype(np.float64)


def _lowest_fitting(
    values: FloatArray, offset: IntArray, n_days: int, per_day: float, stat: VolumeStatistic
) -> float:
    """Binary search over the distinct risks: daily volume only grows as the threshold falls."""
    candidates = np.unique(values)[::-1]
    low, high = 0, candidates.size  # candidates[:low] fit; candidates[high:] do not
    while low < high:
        middle = (low + high) // 2
        counts = _counts_at(values, offset, n_days, float(candidates[middle]))
        if _volume(counts, stat) <= per_day:
            low = middle + 1
        else:
            high = middle
    return float(candidates[low - 1]) if low > 0 else math.inf


def threshold_for_capacity(
    risk: npt.ArrayLike,
    day: npt.ArrayLike,
    per_day: float,
    *,
    is_fraud: npt.ArrayLike | None = None,
    statistic: VolumeStatistic = "p90",
) -> CapacityThreshold:
    """The lowest risk threshold whose daily alert volume fits a review capacity of `per_day`.

    Parameters
    ----------
    risk
        One risk per event; events with risk >= the threshold are alerted.
    day
        Integer day number per event.
    per_day
        Reviews the team can do per day (zero or more).
    is_fraud
        Optional fraud flag per event, for recall and precision at the threshold.
    statistic
        ``"p90"`` (the default) asks that the 90th percentile of daily volumes fit (numpy's
        linear quantile), so the queue overflows on about one day in ten; ``"mean"`` asks only
        that the average day fit.

    Returns
    -------
    CapacityThreshold

    Examples
    --------
    >>> r = threshold_for_capacity([0.9, 0.8, 0.3, 0.7, 0.6, 0.2], [0, 0, 0, 1, 1, 1], 2)
    >>> r.threshold, r.alerts, r.mean_per_day, r.max_per_day
    (0.6, 4, 2.0, 2)
    """
    if statistic not in ("mean", "p90"):
        raise ValueError(f"statistic must be 'mean' or 'p90', got {statistic!r}")
    if per_day < 0 or math.isnan(per_day):
        raise ValueError(f"review capacity per day must be zero or more, got {per_day}")
    values = as_risk(risk)
    days = as_days(day, values.size)
    if values.size == 0:
        raise ValueError("cannot choose a threshold from no events")
    offset = days - days.min()
    n_days = int(offset.max()) + 1
    threshold = _lowest_fitting(values, offset, n_days, per_day, statistic)
    counts = _counts_at(values, offset, n_days, threshold)
    alerted = values >= threshold
    recall, precision = math.nan, math.nan
    if is_fraud is not None:
        flags = as_flags(is_fraud, values.size)
        caught, fraud, alerts = (alerted & flags).sum(), flags.sum(), alerted.sum()
        recall = float(caught / fraud) if fraud else math.nan
        precision = float(caught / alerts) if alerts else math.nan
    return CapacityThreshold(
        per_day=float(per_day),
        statistic=statistic,
        threshold=threshold,
        alerts=int(alerted.sum()),
        alert_rate=float(alerted.mean()),
        mean_per_day=_volume(counts, "mean"),
        p90_per_day=_volume(counts, "p90"),
        max_per_day=int(counts.max()),
        recall=recall,
        precision=precision,
    )


def capacity_table(
    risk: npt.ArrayLike,
    day: npt.ArrayLike,
    capacities: Sequence[float],
    *,
    is_fraud: npt.ArrayLike | None = None,
    statistic: VolumeStatistic = "p90",
) -> list[CapacityThreshold]:
    """`threshold_for_capacity` for each daily review capacity in `capacities`.

    Parameters
    ----------
    risk, day
        One risk and one integer day number per event.
    capacities
        Review capacities per day.
    is_fraud, statistic
        As in `threshold_for_capacity`.

    Returns
    -------
    list of CapacityThreshold
        One row per capacity, in the order given.

    Examples
    --------
    >>> rows = capacity_table([0.9, 0.8, 0.3, 0.7], [0, 0, 0, 1], [1, 2], statistic="mean")
    >>> [(row.per_day, row.threshold) for row in rows]
    [(1.0, 0.8), (2.0, 0.3)]
    """
    values = as_risk(risk)
    days = as_days(day, values.size)
    return [
        threshold_for_capacity(values, days, c, is_fraud=is_fraud, statistic=statistic)
        for c in capacities
    ]
