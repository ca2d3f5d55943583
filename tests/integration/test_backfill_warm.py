"""``emberscore backfill --warm``: the end state of a history, written into a real Redis.

The reference is the embedded store after the per-event replay of the same history
(`service.replay.replay` through `Engine`, `MemoryStore` and an in-process `Learner`): every
identifier alive at the end must be in Redis with the very same profile members, and nothing
else. Lifetimes follow Redis's documented TTL semantics (https://redis.io/docs/latest/commands/ttl/:
"the remaining time to live of a key that has a timeout", in seconds): each key gets what its
record had left at the end of the history. The last check is the point of warming: a new
deployment on the warmed Redis scores the events that follow the history exactly as the
embedded engine that lived through it does.

The redis-server is the session's own (tests/conftest.py), flushed for each test. All data is
invented (`service.scenario`).
"""

from __future__ import annotations

import asyncio
import math
import os
import socket
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from scoring.fusion import Fusion, ModelSnapshot
from scoring.hashing import KeyHasher
from scoring.profile import Profile
from service.cli import main
from service.config import Settings
from service.engine import Engine
from service.files import write_events, write_labels
from service.replay import event_at, replay
from service.scenario import Scenario, ScenarioParams, generate
from service.stores.memory import MemoryStore
from service.stores.redis import RedisStore
from service.stores.redis_keys import SINCE_KEY, VERSION_KEY, identifier_key
from service.tables import EventTable, LabelTable
from service.workers.learner import Learner

pytestmark = pytest.mark.redis

SECRET = "invented-warm-test-secret"
REL = 1e-12
SHORT_LIVES = {"half_lives_s": "600,3600,7200", "label_half_life_s": "7200"}


@pytest.fixture(scope="module")
def world() -> Scenario:
    return generate(ScenarioParams(n_events=6_000, days=21, promo_day=15, seed=23))


def history(world: Scenario, share: float = 0.9) -> tuple[EventTable, EventTable, LabelTable]:
    """The first ``share`` of the events (the history), the rest, and the labels known by the
    end of the history."""
    cut = int(len(world.events) * share)
    head = world.events.take(np.arange(cut))
    tail = world.events.take(np.arange(cut, len(world.events)))
    known = np.flatnonzero(world.labels.labeled_at_s <= head.ts_s[-1])
    labels = LabelTable(
        [world.labels.event_id[i] for i in known],
        world.labels.labeled_at_s[known],
        world.labels.is_fraud[known],
    )
    return head, tail, labels


def environment(monkeypatch: pytest.MonkeyPatch, **values: str) -> Settings:
    for name in list(os.environ):
        if name.startswith("EMBERSCORE_"):
            monkeypatch.delenv(name)
    monkeypatch.setenv("EMBERSCORE_HASH_SECRET", SECRET)
    for name, value in values.items():
        monkeypatch.setenv(f"EMBERSCORE_{name.upper()}", value)
    return Settings(score_budget_ms=5000.0)


def per_event(events: EventTable, labels: LabelTable, s: Settings) -> tuple[MemoryStore, Fusion]:
    config = s.scoring_config()
    store = MemoryStore(config, s.idempotency_ttl_s, s.label_horizon_s)
    fusion = Fusion(config)
    engine = Engine(
        store, config, KeyHasher(s.secret_bytes()), fusion, Learner(store, config, fusion)
    )
    asyncio.run(replay(engine, events, labels))
    return store, fusion


def run_backfill(tmp_path: Path, events: EventTable, labels: LabelTable, url: str) -> Path:
    write_events(tmp_path / "events.parquet", events)
    write_labels(tmp_path / "labels.csv", labels)
    model = tmp_path / "model.msgpack"
    args = ["backfill", str(tmp_path / "events.parquet"), "--labels", str(tmp_path / "labels.csv"),
            "--out", str(tmp_path / "scores.csv"), "--warm", url, "--save-model", str(model),
            "--no-progress"]  # fmt: skip
    code = main(args)
    assert code == 0
    return model


def alive(store: MemoryStore, end_s: float, ttl_s: float) -> dict[tuple[str, bytes], Profile]:
    return {
        key: p
        for key, p in store.profiles.items()
        if p.last_s is not None and end_s - p.last_s <= ttl_s
    }


def identifier_keys(client: Any) -> set[bytes]:
    """Keys of identifier records: ``es{<letter><11 base64url characters>}``."""
    return {k for k in client.scan_iter(match="es{*", count=1000) if len(k) == 16}


def assert_same_members(kind: str, expected: Profile, got: dict[str, float]) -> None:
    want = expected.to_members()
    assert sorted(got) == sorted(want), kind
    for name, value in want.items():
        assert math.isclose(got[name], value, rel_tol=REL, abs_tol=0.0), f"{kind}.{name}"


def check_profiles(
    client: Any,
    expected: dict[tuple[str, bytes], Profile],
    end_s: float,
    ttl_s: float,
    started: float,
) -> None:
    """Members of every expected profile, and its TTL: what was left at the end of the history,
    less at most the seconds since the command started (Redis counts down meanwhile)."""
    items = list(expected.items())
    pipe = client.pipeline(transaction=False)
    for (kind, digest), _ in items:
        pipe.zrange(identifier_key(kind, digest), 0, -1, withscores=True)
        pipe.ttl(identifier_key(kind, digest))
    replies = pipe.execute()
    waited = math.ceil(time.monotonic() - started) + 1  # TTL is rounded to whole seconds
    for i, ((kind, _), profile) in enumerate(items):
        pairs, ttl = replies[2 * i], replies[2 * i + 1]
        assert_same_members(kind, profile, {m.decode(): s for m, s in pairs})
        assert profile.last_s is not None
        left = math.ceil(ttl_s - (end_s - profile.last_s))
        assert left - waited <= ttl <= left


def test_warm_writes_the_per_event_end_state(
    world: Scenario,
    tmp_path: Path,
    redis_url: str,
    redis_server: Any,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    s = environment(monkeypatch)
    head, _, labels = history(world)
    started = time.monotonic()
    model = run_backfill(tmp_path, head, labels, redis_url)
    config = s.scoring_config()
    end = float(head.ts_s[-1])
    store, fusion = per_event(head, labels, s)
    expected = alive(store, end, config.ttl_s)
    assert any(p.bad or p.good for p in expected.values())  # labels reached the statistics
    with redis_server.client() as client:
        assert len(identifier_keys(client)) == len(expected)
        check_profiles(client, expected, end, config.ttl_s, started)
        assert client.get(SINCE_KEY) == repr(float(head.ts_s[0])).encode()
        saved = ModelSnapshot.from_bytes(model.read_bytes())
        assert client.get(VERSION_KEY) == str(saved.version).encode()
        assert saved.version == fusion.snapshot.version > 0


def test_expired_identifiers_are_not_written(
    world: Scenario,
    tmp_path: Path,
    redis_url: str,
    redis_server: Any,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Six-hour records over three weeks: most identifiers are gone by the end; only the live
    ones are written, each with the few seconds or hours it has left."""
    s = environment(monkeypatch, **SHORT_LIVES)
    head, _, labels = history(world)
    started = time.monotonic()
    run_backfill(tmp_path, head, labels, redis_url)
    config = s.scoring_config()
    end = float(head.ts_s[-1])
    store, _ = per_event(head, labels, s)
    expected = alive(store, end, config.ttl_s)
    assert 0 < len(expected) < len(store.profiles) / 2
    with redis_server.client() as client:
        assert len(identifier_keys(client)) == len(expected)
        check_profiles(client, expected, end, config.ttl_s, started)
        assert max(client.ttl(k) for k in identifier_keys(client)) <= math.ceil(config.ttl_s)


def test_a_warmed_deployment_scores_what_follows_like_the_engine_that_lived_it(
    world: Scenario, tmp_path: Path, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    s = environment(monkeypatch)
    head, tail, labels = history(world)
    model = run_backfill(tmp_path, head, labels, redis_url)
    snapshot = ModelSnapshot.from_bytes(model.read_bytes())
    config, hasher = s.scoring_config(), KeyHasher(s.secret_bytes())
    memory, _ = per_event(head, labels, s)
    lived = Engine(memory, config, hasher, Fusion(config, snapshot))

    async def both() -> tuple[list[float], list[float]]:
        redis_store = await RedisStore.connect(
            s.model_copy(update={"redis_url": redis_url}), config
        )
        warmed = Engine(redis_store, config, hasher, Fusion(config, snapshot))
        try:
            a, b = [], []
            for i in range(len(tail)):
                a.append((await lived.score(event_at(tail, i))).risk)
                b.append((await warmed.score(event_at(tail, i))).risk)
            return a, b
        finally:
            await redis_store.close()

    expected, got = asyncio.run(both())
    assert len(got) > 500
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9)


def test_an_unreachable_redis_is_a_clear_error(
    world: Scenario,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    environment(monkeypatch)
    head, _, _ = history(world, 0.3)
    with socket.socket() as probe:  # a loopback port nobody listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    write_events(tmp_path / "events.csv", head)
    code = main(["backfill", str(tmp_path / "events.csv"), "--out", str(tmp_path / "s.csv"),
                 "--warm", f"redis://:a-password@127.0.0.1:{port}/0", "--no-progress"])  # fmt: skip
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("emberscore backfill: error: could not warm Redis")
    assert "a-password" not in err
    assert "Traceback" not in err
