"""The batch path in stages, and the identifier state a replayed history ends with.

`scoring.batch.replay_columns` runs a whole history in one call. A long backfill wants to stop and
resume, so the work comes as three stages whose outputs can be kept between runs:
`scoring.batch.prepare_replay` (label schedule, label reads and the feature matrix; nothing there
depends on the model), then this module's `learn_versions` (the learner's order of learning,
every published model state) and `score_range` (any slice of rows). Run back to back they give
exactly what `replay_columns` gives; they only call the batch path's own functions, so there is
no second copy of the maths.

`final_profiles` gives the `Profile` of every identifier still alive at the end of the history,
as the embedded store holds it after the per-event replay of the same stream, so that a new
deployment can start from history (`emberscore backfill --warm`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from scoring.batch import (
    Application,
    PreparedReplay,
    _Versions,
    run_learning,
    score_rows,
    stack_versions,
)
from scoring.batch_features import (
    KindIndex,
    epoch_factors,
    index_kind,
    segmented_cumsum,
)
from scoring.batch_plan import PlannedColumns
from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.fusion import Fusion, OnlineModel
from scoring.profile import Profile, TimeBasis, _add


def _example_columns() -> tuple[PlannedColumns, ScoringConfig]:
    """Three events of one account, two of them with a device, planned (for the examples)."""
    from scoring.batch_plan import ColumnPlanner
    from scoring.hashing import KeyHasher

    config = ScoringConfig()
    fields: dict[str, Sequence[str | None]] = {f: [None] * 3 for f in ("ip", "phone", "email")}
    fields |= {"account_id": ["acct-1"] * 3, "device_id": ["dev-1", None, "dev-1"]}
    times = np.array([1_790_000_000.0, 1_790_000_600.0, 1_790_003_600.0])
    amounts = np.array([np.nan, np.nan, 40.0])
    planner = ColumnPlanner(config, KeyHasher(b"example-secret"))
    return planner.plan(["e1", "e2", "e3"], times, ["login"] * 3, amounts, fields), config


# --- stages ------------------------------------------------------------------------------------


@dataclass
class LearnedVersions:
    """Every model state published during the history, and which one scored each row.

    `to_arrays` and `from_arrays` turn it into plain numeric arrays and back, so that a caller
    can keep it between runs without pickling anything.

    Examples
    --------
    >>> cols, config = _example_columns()
    >>> from scoring.batch import prepare_replay
    >>> prepared = prepare_replay(cols, None, config, record_ttl_s=86400.0)
    >>> learned = learn_versions(prepared, cols, Fusion(config), None, record_ttl_s=86400.0)
    >>> learned.published, learned.version_of.tolist()   # frozen: the starting state only
    (0, [0, 0, 0])
    """

    versions: _Versions
    version_of: np.ndarray
    _stacked: tuple[Fusion, dict[str, np.ndarray]] | None = dataclasses.field(
        default=None, repr=False, compare=False
    )

    def stacked(self, fusion: Fusion) -> dict[str, np.ndarray]:
        """`stack_versions`, built once and kept: every chunk of a run scores with it."""
        if self._stacked is None or self._stacked[0] is not fusion:
            self._stacked = (fusion, stack_versions(self.versions, fusion))
        return self._stacked[1]

    @property
    def published(self) -> int:
        """Model versions published during the history (the starting state not counted)."""
        return len(self.versions.number) - 1

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays: ``version_of`` and one ``versions.<field>`` per published-state field.

        >>> learned = LearnedVersions(_Versions(), np.zeros(2, dtype=np.int64))
        >>> learned.versions.add(Fusion(ScoringConfig()))
        >>> back = LearnedVersions.from_arrays(learned.to_arrays())
        >>> back.published, back.to_arrays().keys() == learned.to_arrays().keys()
        (0, True)
        """
        out = {"version_of": np.asarray(self.version_of)}
        for f in dataclasses.fields(self.versions):
            values = getattr(self.versions, f.name)
            out[f"versions.{f.name}"] = np.array(values)
        return out

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> LearnedVersions:
        """Rebuild from `to_arrays` output (rows of 2-D arrays, Python numbers of 1-D ones)."""
        values: dict[str, list[object]] = {}
        for f in dataclasses.fields(_Versions):
            stacked = arrays[f"versions.{f.name}"]
            values[f.name] = list(stacked) if stacked.ndim == 2 else stacked.tolist()
        return cls(_Versions(**values), np.asarray(arrays["version_of"], dtype=np.int64))  # type: ignore[arg-type]


def learn_versions(
    prepared: PreparedReplay,
    cols: PlannedColumns,
    fusion: Fusion,
    model: OnlineModel | None,
    *,
    record_ttl_s: float,
) -> LearnedVersions:
    """Learn in the per-event learner's order (`run_learning`); None freezes ``fusion``'s model.

    ``fusion`` ends on the last published snapshot, as in `replay_columns`.

    >>> cols, config = _example_columns()
    >>> from scoring.batch import prepare_replay
    >>> prepared = prepare_replay(cols, None, config, record_ttl_s=60 * 86400.0)
    >>> learn_versions(prepared, cols, Fusion(config), None, record_ttl_s=60 * 86400.0).published
    0
    """
    versions, version_of = run_learning(
        prepared.x, cols, prepared.applications, fusion, model, record_ttl_s
    )
    return LearnedVersions(versions, version_of)


def score_range(
    prepared: PreparedReplay,
    learned: LearnedVersions,
    fusion: Fusion,
    start: int,
    stop: int,
    progress: Callable[[int], None] | None = None,
) -> tuple[np.ndarray, list[str], list[str]]:
    """Risk, decision and reasons of rows ``start`` to ``stop`` (each row on its own).

    ``progress`` is called with the number of rows of this range scored so far.

    >>> cols, config = _example_columns()
    >>> fusion = Fusion(config)
    >>> from scoring.batch import prepare_replay
    >>> prepared = prepare_replay(cols, None, config, record_ttl_s=60 * 86400.0)
    >>> learned = learn_versions(prepared, cols, fusion, None, record_ttl_s=60 * 86400.0)
    >>> risk, decisions, reasons = score_range(prepared, learned, fusion, 1, 3)
    >>> len(risk), decisions
    (2, ['allow', 'allow'])
    """
    x = prepared.x[start:stop]
    version_of = learned.version_of[start:stop]
    params = learned.stacked(fusion)
    return score_rows(x, learned.versions, version_of, fusion, progress=progress, params=params)


# --- final identifier state --------------------------------------------------------------------


def final_profiles(
    cols: PlannedColumns,
    applications: Sequence[Application],
    config: ScoringConfig,
    *,
    now_s: float | None = None,
) -> Iterator[tuple[str, bytes, Profile]]:
    """Every identifier's `Profile` at the end of a time-sorted history, as the embedded store
    holds it after replaying the same events and label applications.

    Only identifiers alive at ``now_s`` (default: the last event's time) are given: those whose
    last event is at most ``config.ttl_s`` before it. A profile holds the events of its
    identifier's last lifetime segment and the labels applied to it (`schedule_labels` gives
    ``applications``), added up in the order the per-event path adds them.

    >>> cols, config = _example_columns()
    >>> found = {kind: p for kind, _, p in final_profiles(cols, [], config)}
    >>> sorted(found)
    ['account', 'device']
    >>> a = found["account"]
    >>> a.first_s, a.last_s, round(a.count(0, 1_790_003_600.0, config), 6)  # 1-hour counter
    (1790000000, 1790003600, 2.061231)
    >>> round(2 ** -1 + 2 ** (-3000 / 3600) + 1, 6)  # events 3600 s, 3000 s and 0 s before
    2.061231
    >>> sorted(a.fanout["d"].values()), len(a.amount)
    ([1790003600], 1)
    """
    if len(cols) == 0:
        return
    now = float(cols.ts_s[-1]) if now_s is None else float(now_s)
    for kind in config.kinds:
        yield from _kind_profiles(cols, kind, applications, config, now)


@dataclass
class _Finals:
    """The last lifetime segment of each live identifier of one kind (positions in index order)."""

    codes: list[int]  # identifier code per profile
    start: np.ndarray  # first position of the segment
    stop: np.ndarray  # one past its last position
    profile_at: np.ndarray  # per position in index order: profile number, -1 if not final/live


def _finals(
    index: KindIndex, ids: np.ndarray, ts_s: np.ndarray, ttl_s: float, now: float
) -> _Finals:
    order = index.order
    sorted_ids = ids[order]
    last = np.flatnonzero(np.append(sorted_ids[1:] != sorted_ids[:-1], True))
    seg_first = np.flatnonzero(index.starts)
    start = seg_first[index.segment[last]]
    last_s = np.trunc(ts_s[order[last]])  # the store keeps whole seconds, as int() does
    live = now - last_s <= ttl_s  # the store drops a record once ``now - last_s > ttl``
    start, stop = start[live], last[live] + 1
    marks = np.zeros(len(order) + 1, dtype=np.int64)  # the ranges are disjoint: a step up
    marks[start] += np.arange(1, len(start) + 1)  # to profile number + 1 at each start, and
    marks[stop] -= np.arange(1, len(start) + 1)  # back down to 0 after each segment
    profile_at = np.cumsum(marks[:-1]) - 1
    return _Finals(sorted_ids[start].tolist(), start, stop, profile_at)


@dataclass
class _Kind:
    """One kind's events grouped by identifier (`KindIndex`) and its live final segments."""

    kind: str
    cols: PlannedColumns
    config: ScoringConfig
    index: KindIndex
    finals: _Finals
    t_whole: np.ndarray  # per position in index order: the event's whole second, as int() gives


def _kind_profiles(
    cols: PlannedColumns,
    kind: str,
    applications: Sequence[Application],
    config: ScoringConfig,
    now: float,
) -> Iterator[tuple[str, bytes, Profile]]:
    ids = cols.ids[kind]
    index = index_kind(ids, cols.ts_s, config.ttl_s)
    if len(index.order) == 0:
        return
    finals = _finals(index, ids, cols.ts_s, config.ttl_s, now)
    t_whole = np.trunc(cols.ts_s[index.order]).astype(np.int64)
    view = _Kind(kind, cols, config, index, finals, t_whole)
    profiles = [Profile(config) for _ in finals.codes]
    firsts, lasts = t_whole[finals.start].tolist(), t_whole[finals.stop - 1].tolist()
    for p, first, last in zip(profiles, firsts, lasts, strict=True):
        p.first_s, p.last_s = first, last
    _add_counts(profiles, view)
    if kind == config.amount_kind:
        _add_amounts(profiles, view)
    for target in config.targets_of(kind):
        _add_fanout(profiles, view, cols.buckets[target], KIND_LETTERS[target])
    if kind in config.label_kinds:  # a learning record carries these kinds only
        _add_labels(profiles, view, applications)
    digests = cols.digests[kind]
    for code, profile in zip(finals.codes, profiles, strict=True):
        yield kind, digests[code], profile


def _fold_runs(
    sums: list[dict[int, float]], owner: np.ndarray, epochs: np.ndarray, totals: np.ndarray
) -> None:
    """Add each run's total to its owner's forward-decay sums, in order, as events add them."""
    for who, epoch, total in zip(owner.tolist(), epochs.tolist(), totals.tolist(), strict=True):
        if who >= 0:
            _add(sums[who], epoch, total)


def _runs_of(
    values: np.ndarray, epoch: np.ndarray, owner: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Owner, epoch and sequential total of each run of equal (owner, epoch) in position order."""
    starts = np.ones(len(values), dtype=bool)
    starts[1:] = (owner[1:] != owner[:-1]) | (epoch[1:] != epoch[:-1])
    inclusive = segmented_cumsum(values, starts)  # sequential from zero, as += does
    ends = np.append(np.flatnonzero(starts)[1:], len(values)) - 1
    return owner[ends], epoch[ends], inclusive[ends]


def _add_counts(profiles: list[Profile], view: _Kind) -> None:
    ts = view.cols.ts_s[view.index.order]
    for j, half_life_s in enumerate(view.config.half_lives_s):
        epoch, factor = epoch_factors(ts, half_life_s)
        owner, run_epoch, totals = _runs_of(factor, epoch, view.finals.profile_at)
        _fold_runs([p.counts[j] for p in profiles], owner, run_epoch, totals)


def _add_amounts(profiles: list[Profile], view: _Kind) -> None:
    """Spend: amounts above zero, against the longest counter's landmark (`Profile.record`)."""
    owners = view.finals.profile_at
    amount = view.cols.amount[view.index.order]
    paid = np.flatnonzero((np.nan_to_num(amount, nan=0.0) > 0.0) & (owners >= 0))
    if len(paid) == 0:
        return
    ts = view.cols.ts_s[view.index.order[paid]]
    epoch, factor = epoch_factors(ts, view.config.half_lives_s[-1])
    owner, run_epoch, totals = _runs_of(amount[paid] * factor, epoch, owners[paid])
    _fold_runs([p.amount for p in profiles], owner, run_epoch, totals)


def _add_fanout(
    profiles: list[Profile], view: _Kind, target_buckets: np.ndarray, letter: str
) -> None:
    """Each bucket's last hit (whole seconds) in the segment: the maximum, as times are sorted."""
    owners = view.finals.profile_at
    bucket = target_buckets[view.index.order]
    hits = np.flatnonzero((bucket >= 0) & (owners >= 0))
    if len(hits) == 0:
        return
    key = owners[hits] * (int(bucket.max()) + 1) + bucket[hits]
    by_key = np.lexsort((hits, key))
    last = np.append(key[by_key][1:] != key[by_key][:-1], True)
    chosen = hits[by_key][last]
    times = view.t_whole[chosen].tolist()
    for who, b, t in zip(owners[chosen].tolist(), bucket[chosen].tolist(), times, strict=True):
        profiles[who].fanout.setdefault(letter, {})[b] = t


def _add_labels(profiles: list[Profile], view: _Kind, applications: Sequence[Application]) -> None:
    """Labels reach the record an identifier had when they were applied; only those applied after
    its last segment began reach the final profile (`Learner.apply_label`'s two additions)."""
    ids, finals = view.cols.ids[view.kind], view.finals
    first_row = view.index.order[finals.start]
    profile_of = dict(zip(finals.codes, range(len(finals.codes)), strict=True))
    for a in applications:
        code = int(ids[a.row])
        who = profile_of.get(code, -1) if code >= 0 else -1
        if who < 0 or first_row[who] >= a.position:
            continue
        at_s = float(round(view.cols.ts_s[a.row]))  # a learning record keeps whole seconds
        basis = TimeBasis.at(at_s, view.config)
        if a.previous is not None:
            profiles[who].add_label(basis, a.previous, -1.0)
        profiles[who].add_label(basis, a.is_fraud, 1.0)
