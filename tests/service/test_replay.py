"""Point-in-time replay (`service.replay.replay`): labels count from the moment they arrived.

The rule under test (DESIGN.md tenet 2, and the module docstring): before an event is scored,
every label with ``labeled_at <= ts`` is applied, in ``labeled_at`` order (ties in file order);
labels arriving after the last event are reported as pending. Boundaries are probed with the
neighbouring floats of an event time (`numpy.nextafter`). What an event "saw" is read from the
feature vector it was scored on (its account's bad-rate feature), with the Beta-binomial
posterior mean ``(a + k) / (a + b + n)`` worked by hand for the check. All data is invented.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pytest

from scoring.config import ScoringConfig
from scoring.fusion import Assessment, Fusion
from scoring.hashing import KeyHasher
from service.engine import Engine
from service.replay import ReplayStats, replay
from service.stores.memory import MemoryStore
from service.tables import EventTable, LabelTable, ScoreTable
from service.workers.learner import Learner

SECRET = b"replay-test-secret"
T0 = 1_790_000_000.0
CFG = ScoringConfig(half_lives_s=(60.0, 600.0, 3600.0), label_half_life_s=600.0, warmup_s=0.0)
TIMES = [T0, T0 + 100.0, T0 + 200.0, T0 + 300.0]


class Recording(Fusion):
    def __init__(self, config: ScoringConfig) -> None:
        super().__init__(config)
        self.seen: list[list[float]] = []

    def assess(self, x: Any, *, prior_only: bool = False) -> Assessment:
        self.seen.append(list(x))
        return super().assess(x, prior_only=prior_only)


def events(times: Sequence[float] = TIMES, decisions: bool = False) -> EventTable:
    """One account's logins at the given times (event ids ev-0, ev-1, ...)."""
    n = len(times)
    return EventTable(
        event_id=[f"ev-{i}" for i in range(n)],
        ts_s=np.array(times, dtype=np.float64),
        type=["login"] * n,
        account_id=["acct-willow-204"] * n,
        ip=["11.22.33.44"] * n,
        device_id=["dev-heron-8"] * n,
        phone=[None] * n,
        email=[None] * n,
        amount=np.full(n, np.nan),
        current_decision=[
            ["allow", "review", "deny"][i % 3] if decisions else None for i in range(n)
        ],
    )


def labels(rows: Sequence[tuple[str, float, bool]]) -> LabelTable:
    return LabelTable(
        [r[0] for r in rows],
        np.array([r[1] for r in rows], dtype=np.float64),
        np.array([r[2] for r in rows], dtype=bool),
    )


def run(
    table: EventTable, label_table: LabelTable | None
) -> tuple[ScoreTable, ReplayStats, list[float]]:
    """Replay; return the scores, the counts, and each event's account bad-rate feature."""
    store = MemoryStore(CFG, 3600.0, 86_400.0)
    fusion = Recording(CFG)
    engine = Engine(store, CFG, KeyHasher(SECRET), fusion, Learner(store, CFG, fusion))
    scores, stats = asyncio.run(replay(engine, table, label_table))
    column = fusion.layout.index("account.bad")
    return scores, stats, [x[column] for x in fusion.seen]


def excess(k: float, n: float) -> float:
    """Beta-binomial posterior mean (a + k) / (a + b + n) as log-odds over the base rate."""
    rate = (CFG.prior_alpha + k) / (CFG.prior_alpha + CFG.prior_beta + n)
    return math.log(rate / (1.0 - rate)) - CFG.base_logit


def no_fraud_seen(i: int) -> float:
    """ev-i's bad-rate feature when no label has arrived: k = 0, n = its account's earlier
    logins decayed at the label half-life (600 s)."""
    n = sum(2.0 ** (-(TIMES[i] - TIMES[j]) / 600.0) for j in range(i))
    return excess(0.0, n) if i else 0.0


def fraud_on_ev0_seen(i: int) -> float:
    n = sum(2.0 ** (-(TIMES[i] - TIMES[j]) / 600.0) for j in range(i))
    return excess(2.0 ** (-(TIMES[i] - TIMES[0]) / 600.0), n)


AT_1 = TIMES[1]
BOUNDARY_CASES = [
    # (label time, index of the first event that sees ev-0's fraud label)
    ("just before ev-1", float(np.nextafter(AT_1, -np.inf)), 1),
    ("exactly at ev-1", AT_1, 1),  # labeled_at <= ts: applied before ev-1 is scored
    ("just after ev-1", float(np.nextafter(AT_1, np.inf)), 2),
    ("exactly at the last event", TIMES[-1], 3),
]


@pytest.mark.parametrize(
    ("labeled_at", "first_seen"),
    [c[1:] for c in BOUNDARY_CASES],
    ids=[c[0] for c in BOUNDARY_CASES],
)
def test_labels_apply_before_an_event_exactly_when_they_arrived_at_or_before_it(
    labeled_at: float, first_seen: int
) -> None:
    _, stats, bad = run(events(), labels([("ev-0", labeled_at, True)]))
    for i in range(len(TIMES)):
        expected = fraud_on_ev0_seen(i) if i >= first_seen else no_fraud_seen(i)
        assert bad[i] == pytest.approx(expected, abs=1e-12), i
    assert stats.labels_applied == 1
    assert stats.labels_pending == 0


def test_labels_after_the_last_event_are_pending() -> None:
    late = float(np.nextafter(TIMES[-1], np.inf))
    rows = [("ev-0", late, True), ("ev-1", TIMES[-1] + 3600.0, False), ("ev-1", TIMES[2], False)]
    _, stats, bad = run(events(), labels(rows))
    assert stats.labels_pending == 2
    assert stats.labels_applied == 1  # the one at ev-2's time, before ev-2
    assert bad == pytest.approx([no_fraud_seen(i) for i in range(4)], abs=1e-12)


def test_without_labels_nothing_is_pending() -> None:
    scores, stats, _ = run(events(), None)
    assert (stats.events, stats.labels_applied, stats.labels_pending) == (4, 0, 0)
    assert len(scores) == 4


def test_a_label_at_its_own_events_instant_is_unknown() -> None:
    """A label stamped with its event's own time is applied before that event is scored, when
    no record of it exists yet: it is counted as unknown (and the batch replay agrees)."""
    _, stats, bad = run(events(), labels([("ev-1", TIMES[1], True)]))
    assert stats.labels_unknown == 1
    assert stats.outcomes == {"unknown_event": 1}
    assert bad == pytest.approx([no_fraud_seen(i) for i in range(4)], abs=1e-12)


def test_labels_apply_in_arrival_order_whatever_the_file_order() -> None:
    """The legitimate verdict arrives last, so it stands, though the file lists it first."""
    rows = [("ev-0", T0 + 150.0, False), ("ev-0", T0 + 120.0, True)]
    _, stats, bad = run(events(), labels(rows))
    assert stats.outcomes == {"applied": 1, "changed": 1}
    assert bad[1] == pytest.approx(no_fraud_seen(1), abs=1e-12)  # before both
    assert bad[2] == pytest.approx(no_fraud_seen(2), abs=1e-12)  # fraud came and went
    assert bad[3] == pytest.approx(no_fraud_seen(3), abs=1e-12)


def test_labels_arriving_together_apply_in_file_order() -> None:
    rows = [("ev-0", T0 + 150.0, True), ("ev-0", T0 + 150.0, False)]
    _, stats, bad = run(events(), labels(rows))
    assert stats.outcomes == {"applied": 1, "changed": 1}
    assert bad[2] == pytest.approx(no_fraud_seen(2), abs=1e-12)  # legitimate: the later row
    reverse = [rows[1], rows[0]]
    _, _, bad = run(events(), labels(reverse))
    assert bad[2] == pytest.approx(fraud_on_ev0_seen(2), abs=1e-12)


def test_outcomes_are_counted() -> None:
    rows = [
        ("ev-0", T0 + 50.0, True),
        ("ev-0", T0 + 60.0, True),  # the same word again
        ("ev-404", T0 + 70.0, True),  # no such event
        ("ev-1", T0 + 250.0, False),
    ]
    _, stats, _ = run(events(), labels(rows))
    assert stats.outcomes == {"applied": 2, "duplicate": 1, "unknown_event": 1}
    assert (stats.labels_applied, stats.labels_duplicate, stats.labels_unknown) == (2, 1, 1)


def test_scores_table_carries_the_events_through() -> None:
    table = events(decisions=True)
    scores, _, _ = run(table, None)
    assert scores.event_id == table.event_id
    assert np.array_equal(scores.ts_s, table.ts_s)
    assert scores.current_decision == table.current_decision
    assert scores.amount is None  # no event had an amount
    assert all(0.0 <= r <= 1.0 for r in scores.risk)
    assert len(scores.decision) == len(scores.reasons) == len(table)
