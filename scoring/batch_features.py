"""Feature vectors of a whole history at once, equal to what the per-event engine reads.

The per-event engine keeps, per identifier, forward-decay sums per landmark epoch and reads them
before each event. Over a sorted history the same numbers are prefix sums: for each identifier
*segment* (its events until a gap longer than the record lifetime resets it, as the store's TTL
does) and each epoch, the sum of the factors of the earlier events. This module computes them
column-wise with numpy, in the same order of additions (each run of one segment and one epoch is
summed sequentially from zero, like the per-event dictionary), the same landmarks, the same
pruning and the same reading rule, so both paths agree to the last few units in the last place.

Fan-out sketches become running maxima per bucket; first seen, the first event of a segment;
label statistics are replayed exactly from the label applications (`LabelSums`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from scoring.batch_plan import PlannedColumns
from scoring.config import ScoringConfig
from scoring.decay import EPOCH_HALF_LIVES
from scoring.fanout import linear_count
from scoring.features import EVENT_TYPES, FLAGS, FeatureLayout, horizon_label


@dataclass
class KindIndex:
    """Events carrying one kind, grouped: ``order`` sorts them by (segment, time)."""

    order: np.ndarray  # event positions, grouped by segment, time order inside
    segment: np.ndarray  # per position in `order`: dense segment id
    starts: np.ndarray  # per position in `order`: first event of its segment
    seg_of_event: np.ndarray  # per event (input order): segment id, -1 when absent
    ts_s: np.ndarray  # per position in `order`: the event's time (gathered once, read often)


def index_kind(ids: np.ndarray, ts_s: np.ndarray, ttl_s: float) -> KindIndex:
    """Group the events of one kind by identifier and lifetime segment."""
    present = np.flatnonzero(ids >= 0)
    order = present[_grouped(ids[present], present)]
    sorted_ids = ids[order]
    t = ts_s[order]
    starts = np.ones(len(order), dtype=bool)
    if len(order) > 1:
        same = sorted_ids[1:] == sorted_ids[:-1]
        gap = t[1:] - np.floor(t[:-1]) > ttl_s
        starts[1:] = ~same | gap
    segment = np.cumsum(starts) - 1
    seg_of_event = np.full(len(ids), -1, dtype=np.int64)
    seg_of_event[order] = segment
    return KindIndex(order, segment, starts, seg_of_event, t)


def _grouped(keys: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """The permutation that sorts by (key, position), for non-negative keys and ascending
    positions: the stable sort of the keys. When both fit one int64, each pair is one unique
    number, and any sort of unique numbers (numpy's quicksort, faster) gives that order."""
    if len(keys) == 0:
        return np.zeros(0, dtype=np.int64)
    width = int(positions[-1]) + 1
    if int(keys.max()) < (np.iinfo(np.int64).max - width) // width:
        return np.argsort(keys * width + positions)
    return np.argsort(keys, kind="stable")


def _runs(keys: np.ndarray) -> np.ndarray:
    """Start flags of runs of equal consecutive keys."""
    starts = np.ones(len(keys), dtype=bool)
    if len(keys) > 1:
        starts[1:] = keys[1:] != keys[:-1]
    return starts


def segmented_cumsum(values: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Inclusive prefix sums that restart at each run start, summed sequentially from zero.

    Runs of equal length are stacked and summed along rows, so the additions happen in the same
    order, from the same zero, as a running total per run would make them.

    >>> segmented_cumsum(np.array([1.0, 2.0, 3.0, 4.0]), np.array([True, False, True, False]))
    array([1., 3., 3., 7.])
    """
    out = np.empty_like(values)
    first = np.flatnonzero(starts)
    lengths = np.diff(np.append(first, len(values)))
    by_length = np.argsort(lengths, kind="stable")
    sorted_lengths = lengths[by_length]
    bounds = np.flatnonzero(np.diff(sorted_lengths)) + 1
    for group in np.split(by_length, bounds):
        if len(group) == 0:
            continue
        length = int(lengths[group[0]])
        if length == 1:
            out[first[group]] = values[first[group]]
            continue
        idx = first[group][:, None] + np.arange(length)
        out[idx] = np.cumsum(values[idx], axis=1)
    return out


def epoch_factors(ts_s: np.ndarray, half_life_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Landmark epoch and forward-decay factor of each time (as `decay.forward_weight`)."""
    epoch = np.floor(ts_s / (EPOCH_HALF_LIVES * half_life_s)).astype(np.int64)
    landmark = epoch * EPOCH_HALF_LIVES * half_life_s
    return epoch, np.power(2.0, (ts_s - landmark) / half_life_s)


class _Sums:
    """Reads "state before each event" of per-(segment, epoch) forward-decay sums.

    Positions are in `KindIndex.order`. Before an event, its identifier's record holds the sum of
    its own epoch's earlier events (when there are any) and the sum of the previous epoch's run;
    the per-event reader adds the older entry first, then the current one, dividing by the
    event's factor (and by ``2**512`` for the previous epoch); entries two epochs old are skipped.
    """

    def __init__(self, index: KindIndex, epoch: np.ndarray) -> None:
        self.epoch = epoch  # already in index order
        self.seg_starts = index.starts
        self.run_starts = index.starts | _runs(self.epoch)
        positions = np.arange(len(self.epoch))
        self.run_first = np.maximum.accumulate(np.where(self.run_starts, positions, 0))

    def read(self, values: np.ndarray, factor: np.ndarray) -> np.ndarray:
        n = len(values)
        if n == 0:
            return np.zeros(0)
        inclusive = segmented_cumsum(values, self.run_starts)
        cur = ~self.run_starts
        cur_term = np.zeros(n)
        inner = np.flatnonzero(cur)
        cur_term[inner] = inclusive[inner - 1] / factor[inner]
        first = self.run_first
        prev_last = np.maximum(first - 1, 0)
        prev_ok = ~self.seg_starts[first] & (self.epoch[prev_last] == self.epoch - 1)
        prev_term = np.where(prev_ok, inclusive[prev_last] / factor * 2.0**-EPOCH_HALF_LIVES, 0.0)
        return np.where(prev_ok & cur, prev_term + cur_term, np.where(prev_ok, prev_term, cur_term))


def _kind_counts(
    index: KindIndex, cols: PlannedColumns, config: ScoringConfig
) -> tuple[list[np.ndarray], np.ndarray | None, np.ndarray | None]:
    """Counts per half-life (index order) and, for the amount kind, spend and has-spent."""
    ts = index.ts_s
    counts = []
    spent = has_spent = None
    last = len(config.half_lives_s) - 1
    for j, h in enumerate(config.half_lives_s):
        epoch, factor = epoch_factors(ts, h)
        sums = _Sums(index, epoch)
        counts.append(sums.read(factor, factor))
        if j == last:
            amount = cols.amount[index.order]
            paid = np.nan_to_num(amount, nan=0.0) > 0.0
            spent = sums.read(np.where(paid, amount * factor, 0.0), factor)
            paid_before = segmented_cumsum(paid.astype(np.float64), index.starts) - paid
            has_spent = paid_before > 0
    return counts, spent, has_spent


def rows_below(ts_s: np.ndarray, windows_s: Sequence[float]) -> list[np.ndarray]:
    """Per window, per row: how many rows have a time below ``floor(t) + window``."""
    whole = np.floor(ts_s)
    return [np.searchsorted(ts_s, whole + w, side="left") for w in windows_s]


def recent_ends(index: KindIndex, n_rows: int, below: Sequence[np.ndarray]) -> list[np.ndarray]:
    """Per window, per position: the last position of its segment still within the window.

    For a hit at position p (whole second ``s``), later positions q of the segment see it as
    recent while ``t_q < s + window`` (the sketch's rule: ``s > t_q - window``). Rows are sorted
    by time, so ``t_q < v`` holds exactly when q's row is below the number of rows with a time
    below v; and (segment, row) keys are sorted along the index, as are the limits, so each
    window costs one merge-like search and every comparison is exact.
    """
    keys = index.segment * (n_rows + 1) + index.order
    out = []
    for counts in below:
        limits = index.segment * (n_rows + 1) + counts[index.order]
        out.append(np.searchsorted(keys, limits, side="left") - 1)
    return out


def _covered(
    hit_pos: np.ndarray, next_hit: np.ndarray, recent_end: np.ndarray, n: int
) -> np.ndarray:
    """Per position: how many hits cover it (a hit covers the positions after it, up to the
    next hit of its bucket and while it is recent), counted with a difference array."""
    diff = np.zeros(n + 1, dtype=np.int64)
    end = np.minimum(next_hit, recent_end[hit_pos])
    start = hit_pos + 1
    valid = start <= end
    np.add.at(diff, start[valid], 1)
    np.add.at(diff, end[valid] + 1, -1)
    return np.cumsum(diff[:-1])


def _fanout_occupancy(
    index: KindIndex,
    target_buckets: np.ndarray,
    ends: Sequence[np.ndarray],
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Occupied buckets in both windows, and when the target's own bucket was last hit (-1)."""
    order = index.order
    n = len(order)
    t_int = np.floor(index.ts_s)
    tb = target_buckets[order]
    own_last = np.full(n, -1.0)
    hits = np.flatnonzero(tb >= 0)
    if n == 0 or len(hits) == 0:
        return np.zeros(n, dtype=np.int64), np.zeros(n, dtype=np.int64), own_last
    starts = np.flatnonzero(index.starts)
    seg_last = np.repeat(np.append(starts[1:], n) - 1, np.diff(np.append(starts, n)))
    key = index.segment[hits] * (int(tb.max()) + 1) + tb[hits]
    by_key = _grouped(key, hits)
    hit_pos, seg_bucket = hits[by_key], key[by_key]
    same_next = np.zeros(len(hit_pos), dtype=bool)
    same_next[:-1] = seg_bucket[1:] == seg_bucket[:-1]
    next_hit = np.where(same_next, np.roll(hit_pos, -1), seg_last[hit_pos])
    short, long_ = (_covered(hit_pos, next_hit, end, n) for end in ends)
    same_prev = np.zeros(len(hit_pos), dtype=bool)
    same_prev[1:] = same_next[:-1]
    prev = np.where(same_prev, np.roll(hit_pos, 1), -1)
    own_last[hit_pos] = np.where(prev >= 0, t_int[np.maximum(prev, 0)], -1.0)
    return short, long_, own_last


class BatchFeatureReader:
    """Feature matrix of planned columns (rows in input order), as `FeatureReader` reads them.

    Each kind's columns (and each fan-out pair's) are adjacent in the layout, so they are
    computed as one block in the kind's own order and written with one scatter of whole row
    pieces: far fewer cache misses than one scatter per column.
    """

    def __init__(self, config: ScoringConfig) -> None:
        self.config = config
        self.layout = FeatureLayout.of(config)
        self._col = {name: i for i, name in enumerate(self.layout.names)}
        m = config.fanout_buckets
        self._log_counts = np.array([math.log1p(linear_count(k, m)) for k in range(m + 1)])

    def read(
        self,
        cols: PlannedColumns,
        indexes: dict[str, KindIndex],
        bad: dict[str, np.ndarray],
        observed_since_s: float,
    ) -> np.ndarray:
        """Features of every event; ``bad[kind]`` is the label-sum read per event (NaN: none)."""
        n = len(cols)
        self._ends: dict[str, list[np.ndarray]] = {}
        self._rows_below: list[np.ndarray] | None = None
        x = np.zeros((n, len(self.layout.names)))
        spend: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        for kind in self.config.kinds:
            index = indexes[kind]
            counts, spent, has_spent = _kind_counts(index, cols, self.config)
            self._kind_block(x, kind, index, counts, cols, observed_since_s, bad.get(kind))
            if kind == self.config.amount_kind and spent is not None and has_spent is not None:
                spend = (spent, has_spent, counts[-1])
        for kind, target in self.config.fanout:
            self._fanout_block(x, kind, target, indexes[kind], cols)
        self._event_block(x, cols, indexes, spend)
        return x

    def _kind_block(
        self,
        x: np.ndarray,
        kind: str,
        index: KindIndex,
        counts: Sequence[np.ndarray],
        cols: PlannedColumns,
        observed_since_s: float,
        bad_sum: np.ndarray | None,
    ) -> None:
        order, starts = index.order, index.starts
        if len(order) == 0:
            return
        seen = ~starts
        labelled = kind in self.config.label_kinds
        width = len(counts) + (3 if labelled else 2)
        block = np.zeros((len(order), width))
        for j, c in enumerate(counts):
            block[:, j] = np.where(seen & (c > 0.0), np.log1p(np.maximum(c, 0.0)), 0.0)
        first_pos = np.maximum.accumulate(np.where(starts, np.arange(len(order)), 0))
        first_s = np.floor(index.ts_s[first_pos])
        age_s = index.ts_s - first_s
        censor_before = observed_since_s + self.config.warmup_s
        censored = (first_s < censor_before) & (age_s < self.config.censored_age_s)
        age_s = np.where(censored, self.config.censored_age_s, age_s)
        age = np.where(age_s > 0, np.log1p(np.maximum(age_s, 0.0) / 86400.0), 0.0)
        n = len(counts)
        block[:, n] = np.where(seen, age, 0.0)
        block[:, n + 1] = starts
        if labelled:
            exposure = counts[self.config.exposure_index]
            block[:, n + 2] = np.where(seen, self._bad_rate(order, exposure, bad_sum), 0.0)
        first = self._col[f"{kind}.n_{horizon_label(self.config.half_lives_s[0])}"]
        x[order, first : first + width] = block

    def _bad_rate(
        self, order: np.ndarray, exposure: np.ndarray, bad_sum: np.ndarray | None
    ) -> np.ndarray:
        """Log-odds of the Beta-smoothed fraud share minus the base log-odds (`FeatureReader`)."""
        cfg = self.config
        bad = np.zeros(len(order)) if bad_sum is None else np.nan_to_num(bad_sum[order], nan=0.0)
        bad = np.maximum(bad, 0.0)
        alpha, alpha_beta = cfg.prior_alpha, cfg.prior_alpha + cfg.prior_beta
        rate = np.minimum((alpha + bad) / (alpha_beta + np.maximum(exposure, bad)), 0.999)
        out: np.ndarray = np.log(rate / (1.0 - rate)) - cfg.base_logit
        return out

    def _fanout_block(
        self, x: np.ndarray, kind: str, target: str, index: KindIndex, cols: PlannedColumns
    ) -> None:
        order = index.order
        if len(order) == 0:
            return
        windows = self.config.fanout_windows_s
        ends = self._ends.get(kind)
        if ends is None:
            if self._rows_below is None:
                self._rows_below = rows_below(cols.ts_s, windows)
            ends = self._ends[kind] = recent_ends(index, len(cols), self._rows_below)
        occ_short, occ_long, own_last = _fanout_occupancy(index, cols.buckets[target], ends)
        seen = ~index.starts
        t = index.ts_s
        target_present = cols.ids[target][order] >= 0
        unseen = seen & target_present & ((own_last < 0) | (own_last <= t - windows[1]))
        block = np.zeros((len(order), 3))
        block[:, 0] = np.where(seen, self._log_counts[occ_short], 0.0)
        block[:, 1] = np.where(seen, self._log_counts[occ_long], 0.0)
        block[:, 2] = unseen
        first = self._col[f"{kind}.{target}s_{horizon_label(windows[0])}"]
        x[order, first : first + 3] = block

    def _event_block(
        self,
        x: np.ndarray,
        cols: PlannedColumns,
        indexes: dict[str, KindIndex],
        spend: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
    ) -> None:
        n = len(cols)
        first = self._col[f"type.{EVENT_TYPES[0]}"]
        block = np.zeros((n, len(EVENT_TYPES) + 2 + len(FLAGS)))
        for i in range(len(EVENT_TYPES)):
            block[:, i] = cols.type_index == i
        amount = cols.amount
        paid = np.nan_to_num(amount, nan=0.0) > 0.0
        a = len(EVENT_TYPES)
        block[paid, a] = np.log1p(amount[paid])
        if spend is not None:
            spent, has_spent, events = spend
            index = indexes[self.config.amount_kind]
            order = index.order
            paid_here = amount[order]
            ok = paid[order] & ~index.starts & has_spent & (events > 0.0) & (spent > 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                vs = np.log((paid_here + 1.0) / (spent / events + 1.0))
            block[order[ok], a + 1] = vs[ok]
        block[:, a + 2 :] = cols.flags
        x[:, first : first + block.shape[1]] = block
