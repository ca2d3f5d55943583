"""The per-event engine's feature vectors, recomputed from first principles.

A small invented stream (a few hundred events, a handful of identifiers reused on purpose, times
spanning several half-lives, one gap longer than the record lifetime ``ScoringConfig.ttl_s``, and
labels arriving between events) is replayed through `Engine` + `MemoryStore` + an in-process
`Learner`, capturing the feature vector each event was scored on. Every feature of every event
is then recomputed directly from the list of earlier events and labels, without the forward-decay
sums, sketches or profiles the engine keeps, and compared within 1e-9 (absolute):

- decayed counts ``sum 2**(-(t - t_i)/h)`` over the identifier's earlier events since its last
  lifetime reset (definition of half-life decay; the store forgets an identifier whose last event
  is more than ``ttl_s`` old, `scoring.profile`);
- age in days, ``log1p((t - first_seen) / 86400)``, with first seen in whole seconds
  (`scoring.profile`), and the censoring rule for identifiers first seen within ``warmup_s`` of
  the store's first event (`scoring.features.FeatureReader.read`);
- ``new`` when the identifier has no live record;
- fan-out: linear counting of the distinct buckets (`bucket_of` of the other identifier's digest)
  hit within each window (Whang, Vander-Zanden and Taylor, ACM TODS 15(2), 1990, the estimator
  ``-m ln(1 - V/m)`` of `scoring.fanout.linear_count`), and the "first time with this X" flags;
- the label bad rate as the Beta-binomial posterior mean ``(a + k) / (a + b + n)`` (Gelman et al.,
  Bayesian Data Analysis, 3rd ed., chapter 2; from memory) turned into log-odds minus the base
  log-odds, with ``k`` the decayed fraud labels anchored at their event's time (kept to the second
  in the learning record, `scoring.logrecord`) and counted from when they arrived, ``n`` the decayed
  event count at the label half-life (at least ``k``: a rounded anchor can lie up to half a second
  after its event);
- amount versus usual ``log((amount + 1) / (spent / events + 1))`` on the longest half-life, the
  event-type columns and the normalisation flags.

The 1e-9 tolerance: the engine reads sums of at most a few hundred terms kept against landmarks
up to 512 half-lives away (factors up to 2**512), each term correct to a few units of 2**-53
relative; the reference sums the same terms directly with `math.fsum`. Their difference is a few
hundred times 1e-16 on values below 300: far below 1e-9, which still catches any wrong half-life,
window, anchor, index or boundary (each of those moves a feature by 1e-3 or more).
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
import random
from collections.abc import Sequence
from dataclasses import dataclass, field

import disposable_email_domains
import numpy as np
import pytest

from scoring.config import ScoringConfig
from scoring.fanout import linear_count
from scoring.features import EVENT_TYPES, FLAGS, FeatureLayout, bucket_of, horizon_label
from scoring.fusion import Assessment, Fusion
from scoring.hashing import KeyHasher
from scoring.identifiers import normalise_event
from service.engine import Engine
from service.replay import ReplayStats, replay
from service.stores.memory import MemoryStore
from service.tables import EventTable, LabelTable
from service.workers.learner import Learner

SECRET = b"feature-reference-secret"
TOLERANCE = 1e-9
CONFIG = ScoringConfig(
    half_lives_s=(60.0, 600.0, 3600.0),
    label_half_life_s=600.0,  # not the longest: the exposure counter is not the amount's counter
    fanout_windows_s=(600.0, 3600.0),
    fanout_buckets=8,  # few buckets: different identifiers share buckets on purpose
    ttl_half_lives=2.0,  # an identifier's record lives 2 hours after its last event
    warmup_s=900.0,
    censored_age_s=5400.0,
    base_rate=0.05,
    prior_strength=20.0,
    maturity_s=1800.0,
    negative_sample_rate=0.5,
    takeover_labels=5,
    takeover_negatives=20,
)
# One hour before a landmark epoch boundary of every counter (512 half-lives of 60 s, 600 s and
# 3600 s all divide it), so the stream reads sums kept against two landmarks.
T0 = 1_843_200.0 * 971 - 3600.0
PHASE_1_S = 3 * 3600.0  # three of the longest half-lives
GAP_S = 3 * 3600.0  # longer than the record lifetime (2 hours)
PHASE_2_S = 2 * 3600.0
RECORD_TTL_S = 86_400.0  # every label arrives within the label horizon
MAX_LABEL_DELAY_S = 2400.0  # with one change, < ttl_s: a label never outlives its record's life

ACCOUNTS = [f"acct-{i:02d}" for i in range(1, 9)]
DEVICES = ["dev-amber", "dev-birch", "dev-cedar", "dev-dune", "dev-elm"]
IPS = ["11.22.33.44", "11.22.33.45", "11.22.34.9", "23.45.67.89", "10.1.2.3", "2001:db8::7"]
IPS_RARE = ["999.1.2.3"]  # garbage: flagged, no key
PHONES = [
    "+44 20 7946 0321",
    "+44 20 7946 0001",
    "+1 202 555 0143",
    "+44 7700 900123",
    "+44 56 1234 5678",
    "12345",
]
DISPOSABLE = sorted(disposable_email_domains.blocklist)[0]
EMAILS = [
    "ana@quillpost.example",
    "bo@quillpost.example",
    "cy+promo@quillpost.example",
    "di@lanternmail.example",
    f"eve@{DISPOSABLE}",
    "not-an-email",
]


@dataclass
class Stream:
    events: EventTable
    labels: LabelTable


def _pick(rng: random.Random, pool: Sequence[str], present: float) -> str | None:
    return rng.choice(pool) if rng.random() < present else None


def _times(rng: random.Random, n1: int, n2: int) -> list[float]:
    t1 = [T0 + rng.uniform(0, PHASE_1_S) for _ in range(n1)]
    start_2 = T0 + PHASE_1_S + GAP_S
    t2 = [start_2 + rng.uniform(0, PHASE_2_S) for _ in range(n2)]
    times = sorted(t1 + t2)
    for i in range(1, len(times)):
        if rng.random() < 0.05:
            times[i] = times[i - 1]  # ties: two events in the same instant
        elif rng.random() < 0.1:
            times[i] = max(float(math.ceil(times[i])), times[i - 1])  # whole seconds
    times[0] = T0  # the store starts observing at T0
    return times


def _amount(rng: random.Random, kind: str) -> float:
    if kind != "checkout" or rng.random() < 0.2:
        return math.nan if rng.random() < 0.8 else 0.0
    return round(rng.uniform(5.0, 500.0), 2)


def make_stream(seed: int, n1: int = 260, n2: int = 160) -> Stream:
    """An invented stream with its labels (fraud and legitimate, some changed, some repeated)."""
    rng = random.Random(seed)
    times = _times(rng, n1, n2)
    n = len(times)
    types = [rng.choice([*EVENT_TYPES, *EVENT_TYPES, "refund"]) for _ in range(n)]
    amounts = [_amount(rng, t) for t in types]
    events = EventTable(
        event_id=[f"ev-{seed}-{i:04d}" for i in range(n)],
        ts_s=np.array(times),
        type=types,
        account_id=[_pick(rng, ACCOUNTS, 0.95) for _ in range(n)],
        ip=[_pick(rng, IPS_RARE if rng.random() < 0.03 else IPS, 0.85) for _ in range(n)],
        device_id=[_pick(rng, DEVICES, 0.8) for _ in range(n)],
        phone=[_pick(rng, PHONES, 0.5) for _ in range(n)],
        email=[_pick(rng, EMAILS, 0.7) for _ in range(n)],
        amount=np.array(amounts),
        current_decision=[None] * n,
    )
    return Stream(events, _labels(rng, events))


def _labels(rng: random.Random, events: EventTable) -> LabelTable:
    ids: list[str] = []
    at: list[float] = []
    fraud: list[bool] = []
    for i, ts in enumerate(events.ts_s.tolist()):
        if rng.random() > 0.35:
            continue
        first_at = ts + rng.uniform(1.0, MAX_LABEL_DELAY_S / 2)
        is_fraud = rng.random() < 0.5
        ids.append(events.event_id[i])
        at.append(first_at)
        fraud.append(is_fraud)
        if rng.random() < 0.25:  # a second word on the same event: changed or repeated
            ids.append(events.event_id[i])
            at.append(first_at + rng.uniform(1.0, MAX_LABEL_DELAY_S / 2))
            fraud.append(not is_fraud if rng.random() < 0.7 else is_fraud)
    order = sorted(range(len(ids)), key=lambda j: (rng.random(), j))  # file order is shuffled
    return LabelTable(
        [ids[j] for j in order],
        np.array([at[j] for j in order]),
        np.array([fraud[j] for j in order], dtype=bool),
    )


class Recording(Fusion):
    """A `Fusion` that keeps every feature vector it is asked to assess."""

    def __init__(self, config: ScoringConfig) -> None:
        super().__init__(config)
        self.seen: list[list[float]] = []

    def assess(self, x: Sequence[float], *, prior_only: bool = False) -> Assessment:
        self.seen.append(list(x))
        return super().assess(x, prior_only=prior_only)


def engine_features(stream: Stream) -> tuple[list[list[float]], ReplayStats]:
    store = MemoryStore(CONFIG, 3600.0, RECORD_TTL_S)
    fusion = Recording(CONFIG)
    engine = Engine(store, CONFIG, KeyHasher(SECRET), fusion, Learner(store, CONFIG, fusion))
    _, stats = asyncio.run(replay(engine, stream.events, stream.labels))
    return fusion.seen, stats


# ---------------------------------------------------------------------------------------------
# The reference: plain sums over the list of earlier events.


@dataclass
class Past:
    """One earlier event as the reference sees it."""

    t: float
    ids: dict[str, bytes]
    amount: float | None


@dataclass
class Reference:
    """Features of each event recomputed from the events and labels before it."""

    config: ScoringConfig
    hasher: KeyHasher = field(default_factory=lambda: KeyHasher(SECRET))
    past: list[Past] = field(default_factory=list)
    segment: dict[tuple[str, bytes], list[int]] = field(default_factory=dict)
    fraud: dict[int, bool] = field(default_factory=dict)  # event index -> label in force
    observed_since: float | None = None
    # what the stream exercised, so that the comparison cannot pass vacuously
    seen: dict[str, int] = field(default_factory=dict)

    def identifiers(self, events: EventTable, i: int) -> tuple[dict[str, bytes], frozenset[str]]:
        normalised = normalise_event(
            ip=events.ip[i],
            device_id=events.device_id[i],
            phone=events.phone[i],
            email=events.email[i],
            account_id=events.account_id[i],
        )
        ids = {k: self.hasher.digest(k, v) for k, v in normalised.keys if k in self.config.kinds}
        return ids, normalised.flags

    def live_segment(self, key: tuple[str, bytes], t: float) -> list[int]:
        """Earlier events of the identifier since its last lifetime reset (empty: no record).

        The record is forgotten when an event comes more than ``ttl_s`` after the identifier's
        last event (last seen is kept in whole seconds).
        """
        events = self.segment.get(key, [])
        if events and t - int(self.past[events[-1]].t) > self.config.ttl_s:
            self.count("reset")
            return []
        return events

    def count(self, what: str) -> None:
        self.seen[what] = self.seen.get(what, 0) + 1

    def add(self, t: float, ids: dict[str, bytes], amount: float | None) -> None:
        index = len(self.past)
        for kind, digest in ids.items():
            events = self.live_segment((kind, digest), t)
            self.segment[(kind, digest)] = [*events, index]
        self.past.append(Past(t, ids, amount))


def decayed(ages_s: Sequence[float], half_life_s: float, weights: Sequence[float] = ()) -> float:
    """Definition of half-life decay: ``sum w_i * 2 ** (-age_i / h)``."""
    w = weights or [1.0] * len(ages_s)
    return math.fsum(wi * 2.0 ** (-a / half_life_s) for a, wi in zip(ages_s, w, strict=True))


def kind_features(ref: Reference, kind: str, digest: bytes, t: float) -> dict[str, float]:
    cfg = ref.config
    events = ref.live_segment((kind, digest), t)
    out: dict[str, float] = {}
    if not events:
        out[f"{kind}.new"] = 1.0
        ref.count("new")
        return out
    ages = [t - ref.past[e].t for e in events]
    for h in cfg.half_lives_s:
        out[f"{kind}.n_{horizon_label(h)}"] = math.log1p(decayed(ages, h))
    first_s = int(ref.past[events[0]].t)
    age_s = t - first_s
    assert ref.observed_since is not None
    if first_s < ref.observed_since + cfg.warmup_s and age_s < cfg.censored_age_s:
        age_s = cfg.censored_age_s  # first seen in the warm-up: real age unknown
        ref.count("censored")
    out[f"{kind}.age_d"] = math.log1p(age_s / 86_400.0) if age_s > 0 else 0.0
    if kind in cfg.label_kinds:
        out[f"{kind}.bad"] = bad_rate_excess(ref, events, t)
    return out


def bad_rate_excess(ref: Reference, events: Sequence[int], t: float) -> float:
    """Beta-binomial posterior mean (a + k) / (a + b + n) as log-odds minus the base log-odds."""
    cfg = ref.config
    h = cfg.label_half_life_s
    n = decayed([t - ref.past[e].t for e in events], h)
    frauds = [e for e in events if ref.fraud.get(e) is True]
    k = decayed([t - round(ref.past[e].t) for e in frauds], h)  # anchored at the event's second
    if frauds:
        ref.count("bad")
    if k > n:
        # The anchor is the event's time rounded to the second, up to half a second after the
        # event itself, so k can exceed n by up to 2**(0.5 / h); a share of frauds among events
        # cannot exceed one, and the reader then takes n = k.
        ref.count("anchor_after_event")
        n = k
    rate = (cfg.prior_alpha + k) / (cfg.prior_alpha + cfg.prior_beta + n)
    assert rate < 0.999  # the reader's cap is not what this stream checks
    return math.log(rate / (1.0 - rate)) - cfg.base_logit


def fanout_features(
    ref: Reference, kind: str, target: str, ids: dict[str, bytes], t: float
) -> dict[str, float]:
    cfg = ref.config
    m = cfg.fanout_buckets
    events = ref.live_segment((kind, ids[kind]), t)
    if not events:
        return {}
    last: dict[int, int] = {}  # bucket -> last second it was hit
    for e in events:
        other = ref.past[e].ids.get(target)
        if other is not None:
            b = bucket_of(other, m)
            last[b] = max(last.get(b, -1), int(ref.past[e].t))
    out: dict[str, float] = {}
    for window in cfg.fanout_windows_s:
        occupied = sum(1 for s in last.values() if s > t - window)
        out[f"{kind}.{target}s_{horizon_label(window)}"] = math.log1p(linear_count(occupied, m))
    if target in ids:
        own = last.get(bucket_of(ids[target], m))
        unseen = own is None or own <= t - max(cfg.fanout_windows_s)
        out[f"{kind}.{target}_unseen"] = 1.0 if unseen else 0.0
        ref.count("unseen" if unseen else "seen_before")
    return out


def amount_vs_usual(ref: Reference, ids: dict[str, bytes], amount: float, t: float) -> float:
    cfg = ref.config
    digest = ids.get(cfg.amount_kind)
    if digest is None:
        return 0.0
    events = ref.live_segment((cfg.amount_kind, digest), t)
    paid = [e for e in events if ref.past[e].amount is not None]
    if not paid:
        return 0.0
    h = cfg.half_lives_s[-1]
    spent = decayed([t - ref.past[e].t for e in paid], h, [ref.past[e].amount or 0.0 for e in paid])
    count = decayed([t - ref.past[e].t for e in events], h)
    ref.count("vs_usual")
    return math.log((amount + 1.0) / (spent / count + 1.0))


def event_features(
    ref: Reference,
    ids: dict[str, bytes],
    flags: frozenset[str],
    event_type: str,
    amount: float | None,
    t: float,
) -> dict[str, float]:
    out = {f"type.{name}": 1.0 for name in EVENT_TYPES if name == event_type}
    if amount is not None:
        out["amount.log"] = math.log1p(amount)
        out["amount.vs_usual"] = amount_vs_usual(ref, ids, amount, t)
    out.update({f"flag.{f}": 1.0 for f in FLAGS if f in flags})
    return out


def reference_features(stream: Stream, config: ScoringConfig) -> tuple[np.ndarray, Reference]:
    events, labels = stream.events, stream.labels
    ref = Reference(config)
    layout = FeatureLayout.of(config)
    index = {e: i for i, e in enumerate(events.event_id)}
    label_order = sorted(range(len(labels)), key=lambda j: labels.labeled_at_s[j])  # stable
    next_label = 0
    rows = []
    for i in range(len(events)):
        t = float(events.ts_s[i])
        if ref.observed_since is None:
            ref.observed_since = t
        while next_label < len(label_order) and labels.labeled_at_s[label_order[next_label]] <= t:
            j = label_order[next_label]
            ref.fraud[index[labels.event_id[j]]] = bool(labels.is_fraud[j])  # latest word holds
            next_label += 1
        ids, flags = ref.identifiers(events, i)
        amount = float(events.amount[i])
        amount_or_none = amount if amount > 0 else None  # NaN and 0 carry no amount
        values: dict[str, float] = {}
        for kind, digest in ids.items():
            values.update(kind_features(ref, kind, digest, t))
        for kind, target in config.fanout:
            if kind in ids:
                values.update(fanout_features(ref, kind, target, ids, t))
        values.update(event_features(ref, ids, flags, events.type[i], amount_or_none, t))
        rows.append([values.get(name, 0.0) for name in layout.names])
        ref.add(t, ids, amount_or_none)
    return np.array(rows), ref


Replayed = tuple[np.ndarray, np.ndarray, Reference, ReplayStats]
"""Engine features, reference features, the reference's case counts, replay counts."""


@pytest.fixture(scope="module", params=[7, 11])
def replayed(
    request: pytest.FixtureRequest,
) -> Replayed:
    stream = make_stream(request.param)
    seen, stats = engine_features(stream)
    expected, ref = reference_features(stream, CONFIG)
    return np.array(seen), expected, ref, stats


def test_every_feature_of_every_event_equals_the_reference(
    replayed: Replayed,
) -> None:
    got, expected, _, _ = replayed
    assert got.shape == expected.shape
    names = FeatureLayout.of(CONFIG).names
    diff = np.abs(got - expected)
    worst = np.unravel_index(int(np.argmax(diff)), diff.shape)
    assert diff.max() <= TOLERANCE, (
        f"event {worst[0]}, feature {names[worst[1]]}: engine {got[worst]!r}, "
        f"reference {expected[worst]!r}"
    )


def test_the_stream_exercises_every_rule(
    replayed: Replayed,
) -> None:
    """The comparison above is only as good as the cases the stream contains."""
    got, _, ref, stats = replayed
    names = FeatureLayout.of(CONFIG).names
    for what in ("reset", "new", "censored", "bad", "unseen", "seen_before", "vs_usual"):
        assert ref.seen.get(what, 0) >= 3, what
    assert stats.outcomes.get("changed", 0) >= 3
    assert stats.outcomes.get("duplicate", 0) >= 1
    for name in names:  # every column takes a non-zero value somewhere
        assert np.any(got[:, names.index(name)] != 0.0), name
    epoch_60s = {math.floor(p.t / (512 * 60.0)) for p in ref.past}
    assert len(epoch_60s) == 2  # reads crossed a landmark epoch boundary


def test_reference_rejects_a_wrong_half_life() -> None:
    """Sanity check of the comparison itself: features under another configuration (label
    half-life 3600 s instead of 600 s) differ from the engine's by far more than the tolerance."""
    stream = make_stream(7, n1=120, n2=60)
    seen, _ = engine_features(stream)
    other = dataclasses.replace(CONFIG, label_half_life_s=3600.0)
    expected, _ = reference_features(stream, other)
    assert np.abs(np.array(seen) - expected).max() > 1e-3
