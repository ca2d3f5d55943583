"""The staged batch path and the final identifier state (`scoring.batch_state`).

References named next to each check:

- the per-event engine (`service.replay.replay` over a `MemoryStore`): DESIGN.md tenet 2 makes
  its answers and its final state the definition of a correct backfill;
- `scoring.batch.replay_columns`, the one-call batch path: the stages must give its very bits;
- the definition of exponential decay with a half-life, ``C(t) = sum_i 2 ** (-(t - t_i) / h)``
  (forward decay: Cormode, Shkapenyuk, Srivastava, Xu, ICDE 2009), computed with ``math.fsum``
  by `scoring.decay.brute_force_decayed_sum`, for the counts a warmed profile will report.

Tolerances: forward-decay sums agree to 1e-12 relative (see tests/unit/test_decay.py for the
error budget of the two exponents); times and fan-out buckets are whole seconds and must agree
exactly; label sums are added in the same order from the same numbers.
"""

from __future__ import annotations

import itertools
import math
from collections import defaultdict

import numpy as np
import pytest
from test_backfill_support import SHORT_LIVES, per_event_replay, reference, scenario, settings

from scoring.batch import LabelColumns, prepare_replay, replay_columns
from scoring.batch_plan import ColumnPlanner, PlannedColumns
from scoring.batch_state import LearnedVersions, final_profiles, learn_versions, score_range
from scoring.config import ScoringConfig
from scoring.decay import brute_force_decayed_sum
from scoring.fusion import Fusion, OnlineModel, model_features
from scoring.hashing import KeyHasher
from scoring.profile import Profile
from service.config import Settings
from service.workers.backfill_inputs import label_columns, plan_events

REL = 1e-12
WHOLE = {"f", "l"}  # first and last seen: whole seconds


def planned(s: Settings) -> tuple[PlannedColumns, LabelColumns]:
    sc = scenario()
    planner = ColumnPlanner(s.scoring_config(), KeyHasher(s.secret_bytes()), s.default_region)
    labels, _ = label_columns(sc.events, sc.labels)
    assert labels is not None
    return plan_events(planner, sc.events), labels


def new_model(fusion: Fusion) -> OnlineModel:
    config = fusion.config
    return OnlineModel(model_features(fusion.layout), config.learning_rate, config.l2)


# --- stages ------------------------------------------------------------------------------------


@pytest.mark.parametrize("frozen", [False, True], ids=["learning", "frozen"])
def test_stages_give_the_bits_of_replay_columns(frozen: bool) -> None:
    """Prepared, learned and scored in uneven chunks, the staged path equals the one-call path."""
    s = settings()
    cols, labels = planned(s)
    horizon = s.label_horizon_s
    one_call = Fusion(s.scoring_config())
    expected = replay_columns(
        cols, labels, one_call, None if frozen else new_model(one_call), record_ttl_s=horizon
    )
    fusion = Fusion(s.scoring_config())
    prepared = prepare_replay(cols, labels, fusion.config, record_ttl_s=horizon)
    learned = learn_versions(
        prepared, cols, fusion, None if frozen else new_model(fusion), record_ttl_s=horizon
    )
    bounds = [0, 1, 2500, 2501, 6000, len(cols)]
    parts = [score_range(prepared, learned, fusion, a, b) for a, b in itertools.pairwise(bounds)]
    np.testing.assert_array_equal(np.concatenate([p[0] for p in parts]), expected.risk)
    assert [d for p in parts for d in p[1]] == expected.decision
    assert [r for p in parts for r in p[2]] == expected.reasons
    assert prepared.outcomes == expected.outcomes
    assert prepared.labels_pending == expected.labels_pending
    assert learned.published == expected.model_versions
    assert fusion.snapshot == one_call.snapshot


def test_learned_versions_survive_plain_arrays() -> None:
    """What a checkpoint keeps of the learning stage scores every row with the same bits."""
    s = settings()
    cols, labels = planned(s)
    fusion = Fusion(s.scoring_config())
    prepared = prepare_replay(cols, labels, fusion.config, record_ttl_s=s.label_horizon_s)
    learned = learn_versions(
        prepared, cols, fusion, new_model(fusion), record_ttl_s=s.label_horizon_s
    )
    arrays = learned.to_arrays()
    assert all(a.dtype != object for a in arrays.values())  # storable without pickle
    back = LearnedVersions.from_arrays(arrays)
    assert back.published == learned.published > 0
    original = score_range(prepared, learned, fusion, 0, len(cols))
    again = score_range(prepared, back, fusion, 0, len(cols))
    np.testing.assert_array_equal(again[0], original[0])
    assert again[1:] == original[1:]


def test_labels_with_a_kind_no_event_carries() -> None:
    """Regression: events without any phone or e-mail, and labels arriving. The batch path's
    label reads could not index a kind with no events at all and raised IndexError; the stages
    must treat such a kind as never read, as the per-event engine does."""
    sc = scenario()
    events = sc.events.take(np.arange(4000))
    events.phone = [None] * len(events)
    events.email = [None] * len(events)
    s = settings()
    cols = plan_events(ColumnPlanner(s.scoring_config(), KeyHasher(s.secret_bytes())), events)
    labels, _ = label_columns(events, sc.labels)
    fusion = Fusion(s.scoring_config())
    prepared = prepare_replay(cols, labels, fusion.config, record_ttl_s=s.label_horizon_s)
    assert prepared.applications
    learned = learn_versions(
        prepared, cols, fusion, new_model(fusion), record_ttl_s=s.label_horizon_s
    )
    risk = score_range(prepared, learned, fusion, 0, len(cols))[0]
    label_table = sc.labels
    expected = per_event_replay(events, label_table, s).scores
    np.testing.assert_allclose(risk, expected.risk, rtol=0, atol=1e-9)


def test_unsorted_columns_are_refused() -> None:
    s = settings()
    cols, _ = planned(s)
    cols.ts_s = cols.ts_s[::-1].copy()
    with pytest.raises(ValueError, match="sorted by time"):
        prepare_replay(cols, None, s.scoring_config(), record_ttl_s=s.label_horizon_s)


# --- final profiles ----------------------------------------------------------------------------


def live_store_profiles(
    s: Settings, short: bool
) -> tuple[dict[tuple[str, bytes], Profile], float, ScoringConfig]:
    """The per-event replay's profiles still alive at the last event (the store's own rule)."""
    ref = reference(short=short)
    config = s.scoring_config()
    end = float(scenario().events.ts_s[-1])
    alive = {
        key: p
        for key, p in ref.store.profiles.items()
        if p.last_s is not None and end - p.last_s <= config.ttl_s
    }
    return alive, end, config


def batch_profiles(s: Settings) -> dict[tuple[str, bytes], Profile]:
    cols, labels = planned(s)
    prepared = prepare_replay(cols, labels, s.scoring_config(), record_ttl_s=s.label_horizon_s)
    found = final_profiles(cols, prepared.applications, s.scoring_config())
    return {(kind, digest): p for kind, digest, p in found}


def assert_same_members(key: tuple[str, bytes], expected: Profile, got: Profile) -> None:
    want, have = expected.to_members(), got.to_members()
    assert sorted(have) == sorted(want), f"{key[0]}: members differ"
    for name, value in want.items():
        is_whole = name in WHOLE or (name[:1].isalpha() and name[1:].isdigit())
        if is_whole:  # first/last seen, fan-out buckets: whole seconds, exactly
            assert have[name] == value, f"{key[0]}.{name}: {have[name]} != {value}"
        else:
            assert math.isclose(have[name], value, rel_tol=REL, abs_tol=0.0), (
                f"{key[0]}.{name}: {have[name]!r} != {value!r}"
            )


@pytest.mark.parametrize("short", [False, True], ids=["default-lives", "six-hour-records"])
def test_final_profiles_equal_the_per_event_store(short: bool) -> None:
    """Every profile the embedded store holds at the end (alive), member by member."""
    s = settings(**SHORT_LIVES) if short else settings()
    expected, _, _ = live_store_profiles(s, short)
    got = batch_profiles(s)
    assert set(got) == set(expected)
    assert len(got) > 100
    for key, profile in expected.items():
        assert_same_members(key, profile, got[key])
    labelled = [p for p in got.values() if p.bad or p.good]
    assert labelled, "the stream's labels must reach some profiles"


def test_expired_identifiers_are_left_out() -> None:
    """With six-hour records, most identifiers of three weeks are gone at the end; the ones
    given are exactly those whose last event is within the lifetime."""
    s = settings(**SHORT_LIVES)
    alive, end, config = live_store_profiles(s, short=True)
    everything = reference(short=True).store.profiles
    assert len(alive) < len(everything) / 2
    got = batch_profiles(s)
    assert all(end - p.last_s <= config.ttl_s for p in got.values() if p.last_s is not None)


def _final_segment_times(times: list[float], ttl_s: float) -> list[float]:
    """The events after the last gap longer than the record lifetime (the store's rule)."""
    start = 0
    for i in range(1, len(times)):
        if times[i] - math.floor(times[i - 1]) > ttl_s:
            start = i
    return times[start:]


def test_final_counts_equal_the_decay_definition() -> None:
    """Counts a warmed profile reports at the end of the history equal ``sum 2**(-(t-t_i)/h)``
    over its identifier's events since its record last began (Cormode et al. 2009)."""
    s = settings(**SHORT_LIVES)
    config = s.scoring_config()
    cols, _ = planned(s)
    end = float(cols.ts_s[-1])
    times: dict[tuple[str, int], list[float]] = defaultdict(list)
    for kind in config.kinds:
        for row in np.flatnonzero(cols.ids[kind] >= 0).tolist():
            times[(kind, int(cols.ids[kind][row]))].append(float(cols.ts_s[row]))
    codes = {kind: {d: i for i, d in enumerate(cols.digests[kind])} for kind in config.kinds}
    checked = 0
    for kind, digest, profile in final_profiles(cols, [], config):
        events = _final_segment_times(times[(kind, codes[kind][digest])], config.ttl_s)
        for j, h in enumerate(config.half_lives_s):
            reference_value = brute_force_decayed_sum(((t, 1.0) for t in events), end, h)
            assert math.isclose(profile.count(j, end, config), reference_value, rel_tol=REL)
        checked += 1
    assert checked > 100
