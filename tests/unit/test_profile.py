"""One identifier's statistics (`scoring.profile.Profile`, `TimeBasis`).

References named next to each check: the definition of exponential decay and forward decay
(Cormode et al., ICDE 2009) for the counters, as in ``test_decay.py`` (the 1e-12 relative
tolerance is argued there: exponents up to about 1,100 half-lives, each computed with two
roundings); the Beta-binomial conjugate posterior mean for the smoothed bad rate, with hand-worked
cases in ``tests/data/profile_bad_rate.json``.
"""

from __future__ import annotations

import json
import math
import random
from collections.abc import Sequence
from fractions import Fraction
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.config import DAY_S, KIND_LETTERS, ScoringConfig
from scoring.decay import decayed_value, epoch_length_s, forward_weight
from scoring.features import FeatureReader, bucket_of
from scoring.profile import Profile, TimeBasis

DATA = Path(__file__).parent.parent / "data"
REL = 1e-12
U = 2.0**-53  # unit roundoff of float64
CFG = ScoringConfig()
LETTERS = sorted(set(KIND_LETTERS.values()))
BOUNDARY_S = epoch_length_s(CFG.half_lives_s[0])  # first landmark move of the 1-hour counter

Hit = tuple[str, int]
Event = tuple[float, tuple[Hit, ...], float | None]


def record(profile: Profile, event: Event, weight: float = 1.0) -> None:
    t_s, hits, amount = event
    profile.record(TimeBasis.at(t_s, CFG), hits, amount, weight)


def build(events: list[Event], labels: Sequence[tuple[int, bool]] = ()) -> Profile:
    profile = Profile(CFG)
    for event in events:
        record(profile, event)
    for index, is_fraud in labels:
        profile.add_label(TimeBasis.at(events[index][0], CFG), is_fraud)
    return profile


def readings(profile: Profile, t_s: float) -> list[float]:
    """Every decayed (additive) statistic of a profile at ``t_s``."""
    values = [profile.count(j, t_s, CFG) for j in range(len(CFG.half_lives_s))]
    lh = CFG.label_half_life_s
    values += [decayed_value(profile.bad, t_s, lh), decayed_value(profile.good, t_s, lh)]
    return [*values, decayed_value(profile.amount, t_s, CFG.half_lives_s[-1])]


# Times over 60 days, or within a day of the 1-hour counter's first landmark move.
times = st.one_of(
    st.integers(0, 60 * 86_400),
    st.integers(int(BOUNDARY_S) - 86_400, int(BOUNDARY_S) + 86_400),
).map(float)
hits = st.lists(st.tuples(st.sampled_from(LETTERS), st.integers(0, 31)), max_size=3).map(tuple)
amounts = st.one_of(st.none(), st.floats(min_value=0.01, max_value=5_000.0))
events_st = st.lists(st.tuples(times, hits, amounts), min_size=1, max_size=30)


@st.composite
def histories(draw: st.DrawFn) -> tuple[list[Event], list[tuple[int, bool]]]:
    events = draw(events_st)
    labelled = draw(st.lists(st.integers(0, len(events) - 1), unique=True, max_size=len(events)))
    return events, [(i, draw(st.booleans())) for i in labelled]


def test_time_basis_is_the_forward_weight_of_each_half_life() -> None:
    """Forward decay factor 2^((t - L)/h) per half-life, and for the label half-life."""
    t = BOUNDARY_S + 7_200.0
    basis = TimeBasis.at(t, CFG)
    assert basis.epochs[0] == 1  # two hours into epoch 1
    assert basis.factors[0] == 4.0
    for j, h in enumerate(CFG.half_lives_s):
        assert (basis.epochs[j], basis.factors[j]) == forward_weight(t, h)
    assert (basis.label_epoch, basis.label_factor) == forward_weight(t, CFG.label_half_life_s)


@given(events_st, st.tuples(times, hits, amounts))
def test_record_then_undo_restores_the_additive_part(events: list[Event], extra: Event) -> None:
    """``record(weight=-1)`` takes back counts and amounts, up to the rounding of one addition and
    one subtraction per sum: ``4 u (C + c)`` with ``C`` the reading and ``c`` the event's share.

    First and last seen and fan-out are a minimum and maxima: they keep the undone event (the
    documented behaviour; an identical retried event restores them).
    """
    profile = build(events)
    t = max(e[0] for e in [*events, extra]) + 600.0
    before = readings(profile, t)
    record(profile, extra)
    with_extra = readings(profile, t)
    record(profile, extra, weight=-1.0)
    after = readings(profile, t)
    for b, w, a in zip(before, with_extra, after, strict=True):
        assert a == pytest.approx(b, abs=4 * U * (abs(b) + abs(w - b)) + 1e-300)
    assert profile.last_s == max(int(e[0]) for e in [*events, extra])


@given(st.data(), histories())
def test_any_order_gives_the_same_profile(
    data: st.DataObject, history: tuple[list[Event], list[tuple[int, bool]]]
) -> None:
    """Events and labels commute (forward decay, Cormode et al. ICDE 2009): decayed statistics
    agree to 1e-12 relative; first and last seen and fan-out exactly."""
    events, labels = history
    order = data.draw(st.permutations(range(len(events))))
    shuffled = [events[i] for i in order]
    where = {old: new for new, old in enumerate(order)}
    relabelled = data.draw(st.permutations([(where[i], bad) for i, bad in labels]))
    a, b = build(events, labels), build(shuffled, relabelled)
    t = max(e[0] for e in events) + 3_600.0
    for x, y in zip(readings(a, t), readings(b, t), strict=True):
        assert x == pytest.approx(y, rel=REL, abs=1e-300)
    assert (a.first_s, a.last_s, a.fanout) == (b.first_s, b.last_s, b.fanout)


@given(histories())
def test_members_round_trip_exactly(history: tuple[list[Event], list[tuple[int, bool]]]) -> None:
    """`to_members` / `from_members` restore the profile exactly, also via text (as stored)."""
    profile = build(*history)
    members = profile.to_members()
    assert Profile.from_members(members, CFG) == profile
    as_text = {name: repr(value) for name, value in members.items()}
    assert Profile.from_members(as_text, CFG) == profile  # type: ignore[arg-type]


def test_members_ignore_unknown_names() -> None:
    profile = build([(1_000.0, (("a", 3),), 12.5)], [(0, True)])
    members = profile.to_members() | {"zz": 1.0, "c9.0": 2.0, "x7": 5.0, "b": 3.0}
    assert Profile.from_members(members, CFG) == profile


def test_empty_profile_round_trips() -> None:
    assert Profile(CFG).to_members() == {}
    assert Profile.from_members({}, CFG) == Profile(CFG)


def test_label_fades_with_its_event() -> None:
    """A label is anchored at its event's time: its decayed count equals that event's own count
    at the label half-life, at any later reading (the same forward weight, read the same way)."""
    t_event = BOUNDARY_S - 3_600.0
    profile = build([(t_event, (), None)], [(0, True)])
    for days in (0, 1, 29, 30, 365):
        t = t_event + days * DAY_S
        bad = decayed_value(profile.bad, t, CFG.label_half_life_s)
        assert bad == profile.count(CFG.exposure_index, t, CFG)


def _bad_rate_cases() -> list[dict[str, object]]:
    text = (DATA / "profile_bad_rate.json").read_text(encoding="utf-8")
    cases: list[dict[str, object]] = json.loads(text)["cases"]
    return cases


def _days(case: dict[str, object], key: str) -> list[float]:
    values = case[key]
    assert isinstance(values, list)
    return [float(d) for d in values]


def _labelled_profile(
    config: ScoringConfig, events_day: list[float], fraud_day: list[float], legit: list[float]
) -> Profile:
    profile = Profile(config)
    for day in events_day:
        profile.record(TimeBasis.at(day * DAY_S, config), (), None)
    for days, is_fraud in ((fraud_day, True), (legit, False)):
        for day in days:
            profile.add_label(TimeBasis.at(day * DAY_S, config), is_fraud)
    return profile


def _reader_bad_rate(config: ScoringConfig, profile: Profile, t_s: float) -> float:
    """The bad rate the feature reader uses: it stores ``logit(rate) - logit(base_rate)``."""
    reader = FeatureReader(config)
    x = reader.read(
        TimeBasis.at(t_s, config), [("device", b"d" * 8)], [profile], "login", None, frozenset()
    )
    z = x[reader.layout.index("device.bad")] + config.base_logit
    return 1.0 / (1.0 + math.exp(-z))


@pytest.mark.parametrize("case", _bad_rate_cases(), ids=lambda c: str(c["case"]))
def test_bad_rate_is_the_beta_binomial_posterior_mean(case: dict[str, object]) -> None:
    """Beta-binomial conjugate posterior mean ``(a + k) / (a + b + n)``, worked by hand (the
    table's ``work`` column): the profile's decayed ``k`` and ``n`` give it, and so does the
    feature the lead computes from them in `scoring.features`."""
    config = ScoringConfig(
        base_rate=float(str(case["base_rate"])), prior_strength=float(str(case["prior_strength"]))
    )
    days = [_days(case, key) for key in ("events_day", "fraud_day", "legit_day")]
    profile = _labelled_profile(config, *days)
    t = float(str(case["read_day"])) * DAY_S
    expected = float(Fraction(str(case["expected"])))
    a = config.base_rate * config.prior_strength
    b = (1 - config.base_rate) * config.prior_strength
    k = decayed_value(profile.bad, t, config.label_half_life_s)
    n = profile.count(config.exposure_index, t, config)
    assert (a + k) / (a + b + n) == pytest.approx(expected, rel=REL)
    assert _reader_bad_rate(config, profile, t) == pytest.approx(expected, rel=1e-12)


@given(
    st.lists(st.integers(0, 120), min_size=1, max_size=25),
    st.data(),
    st.integers(0, 90),
)
def test_bad_rate_formula_on_random_histories(
    event_days: list[int], data: st.DataObject, later_days: int
) -> None:
    """The same posterior mean on random histories (each event labelled at most once)."""
    labelled = data.draw(
        st.lists(st.booleans(), min_size=len(event_days), max_size=len(event_days))
    )
    fraud = [d for d, bad in zip(event_days, labelled, strict=True) if bad]
    profile = _labelled_profile(CFG, [float(d) for d in event_days], [float(d) for d in fraud], [])
    t = (max(event_days) + later_days) * DAY_S
    k = math.fsum(2.0 ** (-(t / DAY_S - d) / 30) for d in fraud)
    n = math.fsum(2.0 ** (-(t / DAY_S - d) / 30) for d in event_days)
    expected = (0.5 + k) / (50 + n)  # a = 0.01 * 50, a + b = 50 (the default prior)
    assert _reader_bad_rate(CFG, profile, t) == pytest.approx(expected, rel=1e-12)


def test_memory_stays_bounded() -> None:
    """After many events over centuries of landmark epochs: at most two epochs per counter and at
    most ``fanout_buckets`` fan-out entries per target kind (buckets as the caller derives them)."""
    rng = random.Random(11)
    profile = Profile(CFG)
    m = CFG.fanout_buckets
    t = 0.0
    for step in range(30_000):
        years = rng.uniform(0.5, 3.0) * 365 * DAY_S
        t += rng.uniform(60.0, 4 * 3_600.0) if step < 25_000 else years
        basis = TimeBasis.at(t, CFG)
        digest = rng.getrandbits(64).to_bytes(8, "big")
        profile.record(basis, (("a", bucket_of(digest, m)), ("d", bucket_of(digest[::-1], m))), 9.5)
        if step % 7 == 0:
            profile.add_label(basis, step % 2 == 0)
    assert max(profile.counts[2]) >= 2  # the 30-day counter crossed epochs too
    for sums in (*profile.counts, profile.bad, profile.good, profile.amount):
        assert 1 <= len(sums) <= 2
    assert set(profile.fanout) == {"a", "d"}
    assert all(len(buckets) <= m for buckets in profile.fanout.values())
    assert len(profile.to_members()) <= 2 * (len(CFG.half_lives_s) + 3) + 2 + 2 * m
