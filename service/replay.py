"""Point-in-time replay of history through the engine, with labels applied when they arrived.

Events are taken in time order. Before an event is scored, every label whose ``labeled_at`` is at
or before the event's time is applied (in ``labeled_at`` order), and every sampled event whose
maturity period has passed is learned: exactly what the live service would have known at that
moment, and nothing more.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from scoring.event import Event
from service.engine import Engine
from service.tables import EventTable, LabelTable, ScoreTable
from service.workers.learner import LabelOutcome


@dataclass
class ReplayStats:
    """Counts from a replay."""

    events: int = 0
    labels_applied: int = 0
    labels_unknown: int = 0
    labels_duplicate: int = 0
    labels_pending: int = 0
    outcomes: dict[str, int] = field(default_factory=dict)


def event_at(events: EventTable, i: int) -> Event:
    """Row ``i`` of an event table as an `Event`."""
    amount = float(events.amount[i])
    return Event(
        events.event_id[i],
        float(events.ts_s[i]),
        events.type[i],
        account_id=events.account_id[i],
        ip=events.ip[i],
        device_id=events.device_id[i],
        phone=events.phone[i],
        email=events.email[i],
        amount=None if math.isnan(amount) else amount,
        current_decision=events.current_decision[i],
    )


async def replay(
    engine: Engine,
    events: EventTable,
    labels: LabelTable | None = None,
    progress: Callable[[int], None] | None = None,
) -> tuple[ScoreTable, ReplayStats]:
    """Score ``events`` (sorted by time) in order, applying ``labels`` as they arrived."""
    n = len(events)
    stats = ReplayStats(events=n)
    label_order = (
        np.argsort(labels.labeled_at_s, kind="stable") if labels is not None else np.zeros(0)
    )
    next_label = 0
    risk = np.empty(n)
    decision: list[str] = []
    reasons: list[str] = []
    for i in range(n):
        ts = float(events.ts_s[i])
        while next_label < len(label_order) and labels is not None:
            j = int(label_order[next_label])
            if labels.labeled_at_s[j] > ts:
                break
            outcome = await engine.label(labels.event_id[j], bool(labels.is_fraud[j]))
            _count(stats, outcome)
            next_label += 1
        result = await engine.score(event_at(events, i))
        risk[i] = result.risk
        decision.append(result.decision)
        reasons.append("; ".join(result.reasons))
        if progress is not None and (i & 4095) == 4095:
            progress(i + 1)
    stats.labels_pending = len(label_order) - next_label
    table = ScoreTable(
        list(events.event_id),
        events.ts_s.copy(),
        risk,
        decision,
        reasons,
        list(events.current_decision) if events.has_current_decision() else None,
        events.amount.copy() if not np.all(np.isnan(events.amount)) else None,
    )
    return table, stats


def _count(stats: ReplayStats, outcome: LabelOutcome) -> None:
    stats.outcomes[outcome.value] = stats.outcomes.get(outcome.value, 0) + 1
    if outcome in (LabelOutcome.APPLIED, LabelOutcome.CHANGED):
        stats.labels_applied += 1
    elif outcome is LabelOutcome.UNKNOWN_EVENT:
        stats.labels_unknown += 1
    else:
        stats.labels_duplicate += 1
