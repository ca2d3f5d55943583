"""Forward-decay counters (`scoring.decay`) against the definition of exponential decay.

References named next to each check:

- the definition of a half-life, ``C(t) = sum_i w_i * 2 ** (-(t - t_i) / h)``, computed directly
  by `brute_force` below (``math.fsum``, so the reference adds no rounding of its own beyond one
  ``2 ** x`` per event);
- forward decay (Cormode, Shkapenyuk, Srivastava, Xu, "Forward Decay: A Practical Time Decay
  Model for Streaming Systems", ICDE 2009): sums against a landmark commute, so any arrival order
  and any split into merged parts give the same value;
- ``tests/data/decay_cases.csv``: small cases worked by hand, each row naming its source.

Why a relative tolerance of 1e-12 when the counter and the reference disagree only by rounding:
the counter computes two exponents per event, ``(t_i - L) / h`` and ``(t - L) / h``, each up to
about 1,100 half-lives across two landmark epochs. Each comes out of one subtraction and one
division, so its absolute error is at most about ``2 * 1100 * u`` with ``u = 1.1e-16``, i.e.
2.5e-13, and ``2 ** x`` turns an absolute error ``d`` in ``x`` into a relative error ``ln(2) * d``:
1.7e-13 per factor, 3.5e-13 for the pair. Summing at most a few dozen positive terms adds
``n * u``, a few 1e-15. The bound is thus about 4e-13; 1e-12 leaves a margin of 2.5 and still
fails on any real error (a wrong landmark, half-life or sign is off by far more than 1e-12).
"""

from __future__ import annotations

import bisect
import csv
import math
import random
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.decay import (
    EPOCH_HALF_LIVES,
    DecayedCounter,
    brute_force_decayed_sum,
    epoch_length_s,
    epoch_of,
    forward_weight,
)

DATA = Path(__file__).parent.parent / "data"
REL = 1e-12  # see the module docstring for why
HOUR_S = 3600.0

Event = tuple[float, float]


def brute_force(events: list[Event], t_s: float, half_life_s: float) -> float:
    """Definition of exponential decay, independent of `scoring.decay`: exact sum of the terms."""
    return math.fsum(w * 2.0 ** (-(t_s - t_i) / half_life_s) for t_i, w in events)


def fed(half_life_s: float, events: list[Event]) -> DecayedCounter:
    counter = DecayedCounter(half_life_s)
    for t_s, w in events:
        counter.update(t_s, w)
    return counter


def _table() -> list[dict[str, str]]:
    with (DATA / "decay_cases.csv").open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def _events(cell: str) -> list[Event]:
    pairs = (item.split(":") for item in cell.split(";"))
    return [(float(t), float(w)) for t, w in pairs]


@pytest.mark.parametrize("row", _table(), ids=lambda row: row["case"])
def test_conformance_table(row: dict[str, str]) -> None:
    """Hand-worked values; each row of decay_cases.csv names its source."""
    h = float(row["half_life_s"])
    events = _events(row["events"])
    counter = fed(h, events)
    expected = float(row["expected"])
    assert counter.get(float(row["read_at_s"])) == pytest.approx(expected, rel=REL, abs=1e-300)


def test_count_halves_after_exactly_one_half_life() -> None:
    """Definition of half-life: the count read one half-life later is exactly half.

    Times are chosen so that every exponent is a whole number: the powers of two involved are
    exact in binary floating point, so equality is exact.
    """
    for h in (1.0, 60.0, HOUR_S, 86_400.0, 30 * 86_400.0):
        counter = DecayedCounter(h).update(5 * h).update(5 * h, 2.0)
        for k in range(0, 40):
            assert counter.get(5 * h + (k + 1) * h) == counter.get(5 * h + k * h) / 2


def test_module_helpers_against_their_definitions() -> None:
    """Epoch length is EPOCH_HALF_LIVES half-lives; the forward factor is 2^((t - L)/h)."""
    h = HOUR_S
    assert epoch_length_s(h) == EPOCH_HALF_LIVES * h
    assert epoch_of(epoch_length_s(h) - 1.0, h) == 0
    assert epoch_of(epoch_length_s(h), h) == 1
    assert epoch_of(-1.0, h) == -1  # times before 0 fall in negative epochs (floor, not trunc)
    epoch, factor = forward_weight(epoch_length_s(h) + 3 * h, h)
    assert (epoch, factor) == (1, 8.0)
    assert brute_force_decayed_sum([(0.0, 1.0), (h, 3.0)], 2 * h, h) == 0.25 + 1.5


# Event sets that straddle landmark epoch boundaries: a centre near the start of epoch k and
# events within 30 half-lives either side, so that both orders across a boundary occur.
half_lives = st.sampled_from([1.0, 60.0, HOUR_S, 86_400.0, 30 * 86_400.0, 1234.5])
offsets = st.floats(min_value=-30.0, max_value=30.0, allow_nan=False)
weights = st.floats(min_value=0.01, max_value=100.0, allow_nan=False)


@st.composite
def event_sets(draw: st.DrawFn, min_size: int = 1) -> tuple[float, list[Event]]:
    h = draw(half_lives)
    centre = draw(st.integers(0, 5)) * EPOCH_HALF_LIVES + draw(offsets)
    pairs = draw(st.lists(st.tuples(offsets, weights), min_size=min_size, max_size=40))
    return h, [((centre + off) * h, w) for off, w in pairs]


read_delays = st.floats(min_value=0.0, max_value=20.0, allow_nan=False)


@given(event_sets(), read_delays)
def test_equals_brute_force_sum(case: tuple[float, list[Event]], delay: float) -> None:
    """Streaming value equals the definition summed over the raw events (relative 1e-12)."""
    h, events = case
    t = max(t_i for t_i, _ in events) + delay * h
    assert fed(h, events).get(t) == pytest.approx(brute_force(events, t, h), rel=REL)


@given(st.data(), event_sets(), read_delays)
def test_any_arrival_order_gives_the_same_value(
    data: st.DataObject, case: tuple[float, list[Event]], delay: float
) -> None:
    """Forward decay, Cormode et al. ICDE 2009: additions commute, so order does not matter.

    Late events (older than the newest epoch already held) are part of this: the event sets
    straddle epoch boundaries.
    """
    h, events = case
    shuffled = data.draw(st.permutations(events))
    t = max(t_i for t_i, _ in events) + delay * h
    assert fed(h, shuffled).get(t) == pytest.approx(fed(h, events).get(t), rel=REL)


@given(event_sets(), st.lists(st.integers(0, 2), min_size=40, max_size=40), read_delays)
def test_merge_equals_union_and_is_commutative_and_associative(
    case: tuple[float, list[Event]], parts: list[int], delay: float
) -> None:
    """Merging (`+`) sums fed disjoint parts equals the counter fed their union (forward decay:
    sums against the same landmark add, Cormode et al. ICDE 2009)."""
    h, events = case
    a, b, c = (fed(h, [e for e, p in zip(events, parts, strict=False) if p == k]) for k in range(3))
    t = max(t_i for t_i, _ in events) + delay * h
    union = fed(h, events).get(t)
    assert (a + b + c).get(t) == pytest.approx(union, rel=REL)
    assert (a + b).sums == (b + a).sums  # float addition is exactly commutative
    left, right = (a + b) + c, a + (b + c)
    assert left.sums.keys() == right.sums.keys()
    assert left.get(t) == pytest.approx(right.get(t), rel=REL)


def test_merge_refuses_different_half_lives() -> None:
    with pytest.raises(ValueError, match="half-lives"):
        _ = DecayedCounter(HOUR_S).update(0.0) + DecayedCounter(86_400.0).update(0.0)


@given(event_sets(), read_delays, st.lists(read_delays, min_size=1, max_size=10))
def test_value_never_grows_without_new_events(
    case: tuple[float, list[Event]], start: float, steps: list[float]
) -> None:
    """With non-negative weights and no new events, later readings are never larger.

    Two readings a hair apart may differ by rounding alone (``2 ** x`` is within one unit in the
    last place, not correctly rounded), so 4 units of 2**-52 are allowed.
    """
    h, events = case
    counter = fed(h, events)
    t = max(t_i for t_i, _ in events) + start * h
    previous = counter.get(t)
    for step in steps:
        t += step * h
        value = counter.get(t)
        assert value <= previous * (1 + 4 * 2.0**-52)
        previous = value


@given(event_sets())
def test_state_round_trips(case: tuple[float, list[Event]]) -> None:
    """`to_state` / `from_state` restore the counter exactly, also via text as a store holds it."""
    h, events = case
    counter = fed(h, events)
    assert DecayedCounter.from_state(h, counter.to_state()) == counter
    as_text = {str(epoch): repr(value) for epoch, value in counter.to_state().items()}
    assert DecayedCounter.from_state(h, as_text) == counter  # type: ignore[arg-type]
    state = counter.to_state()
    state.clear()
    assert counter.sums, "to_state returns a copy, not the live state"


@given(event_sets(), st.floats(min_value=0.01, max_value=100.0))
def test_revert_undoes_update(case: tuple[float, list[Event]], w: float) -> None:
    """`revert` with the same arguments takes the value back up to rounding of one addition."""
    h, events = case
    counter = fed(h, events)
    t_new = events[-1][0]
    t = max(t_i for t_i, _ in events)
    before = counter.get(t)
    counter.update(t_new, w).revert(t_new, w)
    scale = before + w * 2.0 ** (-(t - t_new) / h)
    assert counter.get(t) == pytest.approx(before, abs=8 * 2.0**-52 * scale)


def test_late_event_older_than_the_newest_epoch_still_counts() -> None:
    """An event from the previous epoch that arrives after the landmark moved still counts.

    Source: forward decay (Cormode et al. ICDE 2009) makes each event's addition independent of
    arrival order; the reference value is the definition summed by `brute_force`.
    """
    h = HOUR_S
    boundary = epoch_length_s(h)
    on_time = [(boundary + k * 600.0, 1.0) for k in range(12)]
    late = [(boundary - 7200.0, 2.0), (boundary - 60.0, 1.0)]
    counter = fed(h, on_time + late)
    assert set(counter.sums) == {0, 1}
    t = boundary + 7200.0
    assert counter.get(t) == pytest.approx(brute_force(on_time + late, t, h), rel=REL)
    assert counter.get(t) > fed(h, on_time).get(t)


def test_state_keeps_at_most_two_epochs() -> None:
    """Bounded memory: epochs two behind the newest are dropped (they have faded by 2**-512)."""
    h = HOUR_S
    counter = DecayedCounter(h)
    for k in range(20):
        counter.update(k * 300.0 * h, 1.0)  # every 300 half-lives: crosses many epochs
        assert len(counter.sums) <= 2
    counter.update(0.0, 1.0)  # a very late event: 5,700 half-lives old, nothing left of it
    assert len(counter.sums) <= 2


def _ten_years_of_events(seed: int) -> list[float]:
    rng = random.Random(seed)
    t = 0.0
    end = 10 * 365.25 * 86_400.0
    times = []
    while t < end:
        t += rng.randint(60, 540)  # every 1 to 9 minutes, 5 on average
        times.append(t)
    return times


def test_ten_years_on_a_one_hour_half_life() -> None:
    """About a million events over ten years cross 171 landmark epochs of a 1-hour counter:
    no overflow (no inf or nan), at most two epochs held, and every reading, just before and
    after each epoch boundary and in between, equals the definition to 1e-12 relative.

    Reference done in a numerically safe way: ``math.fsum`` over the events of the last 100
    half-lives only, each term ``2 ** -age`` with a small age. The older events it leaves out
    weigh less than ``1e6 * 2 ** -100`` (about 8e-25) together, against a reading of at least
    ``2 ** -0.15`` (the newest event is under 9 minutes old): far below 1e-12 relative.
    """
    h = HOUR_S
    times = _ten_years_of_events(seed=20240611)
    boundaries = [k * epoch_length_s(h) for k in range(1, epoch_of(times[-1], h) + 1)]
    assert len(boundaries) >= 170
    checkpoints = sorted(
        {b + d for b in boundaries for d in (-1800.0, 1.0, 1800.0, 0.5 * epoch_length_s(h))}
    )
    counter = DecayedCounter(h)
    fed_until = 0
    for checkpoint in checkpoints:
        upto = bisect.bisect_right(times, checkpoint)
        for t_i in times[fed_until:upto]:
            counter.update(t_i)
        fed_until = upto
        assert len(counter.sums) <= 2
        assert all(math.isfinite(v) for v in counter.sums.values())
        recent = times[bisect.bisect_left(times, checkpoint - 100 * h) : upto]
        expected = math.fsum(2.0 ** (-(checkpoint - t_i) / h) for t_i in recent)
        value = counter.get(checkpoint)
        assert math.isfinite(value)
        assert value == pytest.approx(expected, rel=REL)
