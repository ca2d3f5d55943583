"""Helpers shared by the backfill tests (this module holds no tests of its own).

One generated three-week stream (invented data: `service.scenario`) is replayed once through the
per-event engine (`service.replay.replay` over a `MemoryStore` with an in-process `Learner`):
that replay is the reference every backfill result is checked against, since DESIGN.md tenet 2
says a backfilled score equals the score the live service would have returned.
"""

from __future__ import annotations

import asyncio
import functools
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from scoring.fusion import Fusion, ModelSnapshot
from scoring.hashing import KeyHasher
from service.config import Settings
from service.engine import Engine
from service.files import read_scores, write_events, write_labels
from service.replay import replay
from service.scenario import Scenario, ScenarioParams, generate
from service.stores.memory import MemoryStore
from service.tables import IDENTIFIER_FIELDS, EventTable, LabelTable, ScoreTable
from service.workers.learner import Learner

SECRET = "invented-backfill-test-secret"
N_EVENTS = 8_000
SHORT_LIVES = {"half_lives_s": [600.0, 3600.0, 7200.0], "label_half_life_s": 7200.0}
"""A configuration whose records live six hours: over three weeks, identifiers expire and come
back, and the 10-minute counter moves its landmark every 3.6 days (both paths must agree)."""


def clean_environment(monkeypatch: pytest.MonkeyPatch, **settings: str) -> None:
    """No EMBERSCORE_* variable but the test secret and ``settings`` (as the CLI reads them)."""
    for name in list(os.environ):
        if name.startswith("EMBERSCORE_"):
            monkeypatch.delenv(name)
    monkeypatch.setenv("EMBERSCORE_HASH_SECRET", SECRET)
    for name, value in settings.items():
        monkeypatch.setenv(f"EMBERSCORE_{name.upper()}", value)


def settings(**overrides: object) -> Settings:
    values: dict[str, object] = {"hash_secret": SECRET, **overrides}
    return Settings(**values)  # type: ignore[arg-type]


@functools.cache
def scenario(seed: int = 11) -> Scenario:
    """The invented stream: ~8,000 events over 21 days with a promotion burst on day 15."""
    return generate(ScenarioParams(n_events=N_EVENTS, days=21, promo_day=15, seed=seed))


@dataclass
class Reference:
    """The per-event engine's replay of a stream: scores, the store it leaves, its learner's
    last snapshot."""

    scores: ScoreTable
    store: MemoryStore
    fusion: Fusion


def per_event_replay(
    events: EventTable,
    labels: LabelTable | None,
    s: Settings,
    frozen: ModelSnapshot | None = None,
) -> Reference:
    """Replay through `Engine` + `MemoryStore` + `Learner`; ``frozen`` scores with that snapshot
    while labels still reach the identifier statistics (the learner publishes elsewhere)."""
    config = s.scoring_config()
    store = MemoryStore(config, s.idempotency_ttl_s, s.label_horizon_s)
    fusion = Fusion(config, frozen)
    learner = Learner(store, config, None if frozen is not None else fusion)
    engine = Engine(store, config, KeyHasher(s.secret_bytes()), fusion, learner)
    scores, _ = asyncio.run(replay(engine, events, labels))
    return Reference(scores, store, fusion)


@functools.cache
def reference(seed: int = 11, short: bool = False) -> Reference:
    """The per-event replay of `scenario` (cached: it takes a couple of seconds)."""
    sc = scenario(seed)
    s = settings(**SHORT_LIVES) if short else settings()
    return per_event_replay(sc.events, sc.labels, s)


def write_stream(folder: Path, formats: tuple[str, ...] = ("csv", "parquet", "jsonl")) -> Path:
    """Events and labels of `scenario` as ``events.<fmt>`` and ``labels.<fmt>`` in ``folder``."""
    sc = scenario()
    for fmt in formats:
        write_events(folder / f"events.{fmt}", sc.events)
        write_labels(folder / f"labels.{fmt}", sc.labels)
    return folder


def assert_matches(path: Path, expected: ScoreTable) -> None:
    """A backfill scores file against the per-event scores: same rows and order, risk equal to
    1e-9 after the file's rounding to six decimals, same decisions and reasons."""
    got = read_scores(path)
    assert got.event_id == expected.event_id
    np.testing.assert_array_equal(got.ts_s, np.round(expected.ts_s, 3))
    rounded = np.rint(expected.risk * 1e6) / 1e6
    np.testing.assert_allclose(got.risk, rounded, rtol=0, atol=1e-9)
    assert got.decision == expected.decision
    assert got.reasons == expected.reasons
    assert got.current_decision == expected.current_decision
    if expected.amount is None:
        assert got.amount is None
    else:
        assert got.amount is not None
        np.testing.assert_array_equal(np.isnan(got.amount), np.isnan(expected.amount))


def identifier_values(events: EventTable) -> set[str]:
    """Every raw identifier value of a stream (none may appear in what the tool writes)."""
    return {v for f in IDENTIFIER_FIELDS for v in getattr(events, f) if v}


def assert_private(text: str, values: set[str]) -> None:
    leaked = sorted(v for v in values if v in text)
    assert not leaked, f"raw identifier values leaked: {leaked[:5]}"
