"""The batch replay gives the per-event engine's answers.

The per-event engine (`service.engine.Engine` over the embedded store, with its in-process
learner, replayed by `service.replay.replay`) is the reference: it is what the live service does.
The batch path (`scoring.batch.replay_columns`) must give the same features, the same scores, the
same decisions and the same reasons for the same stream, labels and settings.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass

import numpy as np
import pytest

from scoring.batch import replay_columns
from scoring.batch_plan import ColumnPlanner
from scoring.config import DAY_S, ScoringConfig
from scoring.fusion import Fusion, OnlineModel, model_features
from scoring.hashing import KeyHasher
from service.engine import Engine
from service.replay import replay
from service.scenario import ScenarioParams, generate
from service.stores.memory import MemoryStore
from service.tables import EventTable, LabelTable
from service.workers.backfill_inputs import label_columns, plan_events
from service.workers.learner import Learner

SECRET = b"parity-test-secret"
RECORD_TTL_S = 30 * DAY_S


@dataclass
class Replayed:
    risk: np.ndarray
    decision: list[str]
    reasons: list[str]
    features: np.ndarray
    outcomes: dict[str, int]
    blend: float = 0.0


def _stream(seed: int) -> tuple[EventTable, LabelTable]:
    params = ScenarioParams(
        seed=seed,
        n_events=6000,
        days=16,
        promo_day=10,
        campus_wave_day=6,
        slow_start_day=2,
        slow_days=9,
    )
    scenario = generate(params)
    return scenario.events, scenario.labels


def _per_event(events: EventTable, labels: LabelTable, config: ScoringConfig) -> Replayed:
    seen: list[list[float]] = []

    class Recording(Fusion):
        def assess(self, x, *, prior_only=False):  # type: ignore[no-untyped-def]
            seen.append(list(x))
            return super().assess(x, prior_only=prior_only)

    store = MemoryStore(config, 3600.0, RECORD_TTL_S)
    fusion = Recording(config)
    engine = Engine(store, config, KeyHasher(SECRET), fusion, Learner(store, config, fusion))
    table, stats = asyncio.run(replay(engine, events, labels))
    return Replayed(table.risk, table.decision, table.reasons, np.array(seen), stats.outcomes)


def _batch(events: EventTable, labels: LabelTable, config: ScoringConfig) -> Replayed:
    columns = plan_events(ColumnPlanner(config, KeyHasher(SECRET)), events)
    label_cols, _ = label_columns(events, labels)
    fusion = Fusion(config)
    model = OnlineModel(model_features(fusion.layout), config.learning_rate, config.l2)
    result = replay_columns(columns, label_cols, fusion, model, record_ttl_s=RECORD_TTL_S)
    blend = fusion._blend
    return Replayed(
        result.risk, result.decision, result.reasons, np.zeros(0), result.outcomes, blend
    )


@pytest.fixture(scope="module")
def both() -> tuple[Replayed, Replayed]:
    # a short label half-life and takeover threshold so that the model takes over in 16 days
    config = ScoringConfig(takeover_labels=40, takeover_negatives=150, maturity_s=4 * DAY_S)
    events, labels = _stream(seed=3)
    return _per_event(events, labels, config), _batch(events, labels, config)


def test_scores_agree(both: tuple[Replayed, Replayed]) -> None:
    reference, batch = both
    assert len(batch.risk) == len(reference.risk) > 5000
    np.testing.assert_allclose(batch.risk, reference.risk, rtol=0, atol=1e-9)


def test_decisions_and_reasons_agree(both: tuple[Replayed, Replayed]) -> None:
    reference, batch = both
    assert batch.decision == reference.decision
    assert batch.reasons == reference.reasons
    assert sum(1 for r in batch.reasons if r) > 100  # reasons were actually compared


def test_labels_are_handled_alike(both: tuple[Replayed, Replayed]) -> None:
    reference, batch = both
    assert batch.outcomes == reference.outcomes
    assert reference.outcomes.get("applied", 0) > 20  # the model did learn during the replay


def test_model_took_over(both: tuple[Replayed, Replayed]) -> None:
    """The stream is long enough for the learned model to matter, not only the prior."""
    _, batch = both
    assert batch.blend > 0.5
