"""Parity: one labelled stream of ~25,000 events replayed through the embedded store and through
a real redis-server gives the same scores and the same identifier statistics; and what Redis
holds afterwards is digests and numbers only, each key with its lifetime.

Reference: the embedded `MemoryStore` is the reference semantics (service/stores/base.py); the
arithmetic claim is IEEE 754 binary64 addition, which both Python floats and Redis sorted-set
scores (ZINCRBY, documented as double precision) use.
"""

from __future__ import annotations

import asyncio
import math
import random
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pytest
import redis

from scoring.config import KIND_LETTERS
from scoring.profile import Profile
from service.replay import ReplayStats, replay
from service.stores.redis import RedisStore
from service.tables import ScoreTable

pytestmark = [pytest.mark.redis, pytest.mark.slow]

N_EVENTS = 25_000
SAMPLE = 3_000


@dataclass
class Run:
    scores: ScoreTable
    stats: ReplayStats
    profiles: dict[tuple[str, bytes], Profile | None] = field(default_factory=dict)


@dataclass
class Parity:
    memory: Run
    redis: Run
    reference: dict[tuple[str, bytes], Profile]
    scenario: Any
    dump: dict[bytes, tuple[bytes, int, list[bytes]]]
    settings: Any


def dump_server(url: str) -> dict[bytes, tuple[bytes, int, list[bytes]]]:
    """Every key with its type, its TTL in ms (-1: none) and every member, field and value."""
    out: dict[bytes, tuple[bytes, int, list[bytes]]] = {}
    with redis.Redis.from_url(url) as c:
        for key in c.scan_iter(count=1000):
            kind = c.type(key)
            parts: list[bytes] = []
            if kind == b"string":
                parts = [c.get(key) or b""]
            elif kind == b"zset":
                parts = [m for m, _ in c.zrange(key, 0, -1, withscores=True)]
            elif kind == b"stream":
                for entry_id, fields in c.xrange(key):
                    parts += [entry_id, *fields.keys(), *fields.values()]
            elif kind == b"hash":
                for name, value in c.hgetall(key).items():
                    parts += [name, value]
            else:
                raise AssertionError(f"unexpected key type {kind!r}")
            out[key] = (kind, int(c.pttl(key)), parts)
    return out


async def _replay_both(kit: Any, url: str) -> Parity:
    scenario = kit.world(N_EVENTS, seed=20)
    settings = kit.settings(url)
    memory = kit.memory_store(settings)
    scores_m, stats_m = await replay(kit.engine(memory, settings), scenario.events, scenario.labels)
    sample = random.Random(5).sample(sorted(memory.profiles), SAMPLE)
    store = await RedisStore.connect(settings, settings.scoring_config())
    try:
        scores_r, stats_r = await replay(
            kit.engine(store, settings), scenario.events, scenario.labels
        )
        await store.flush()
        assert store.counters["failed"] == 0
        assert store.counters["dropped"] == 0
        fetched = {key: await store.profile(*key) for key in sample}
    finally:
        await store.close()
    return Parity(
        Run(scores_m, stats_m),
        Run(scores_r, stats_r, fetched),
        {key: memory.profiles[key] for key in sample},
        scenario,
        dump_server(url),
        settings,
    )


@pytest.fixture(scope="module")
def parity(kit: Any, redis_server: Any) -> Parity:
    redis_server.flush()
    return asyncio.run(_replay_both(kit, redis_server.url))


def test_stream_is_large_and_labelled(parity: Parity) -> None:
    assert len(parity.scenario.events) >= 20_000
    assert parity.memory.stats.labels_applied > 100


def test_every_score_equal(parity: Parity) -> None:
    m, r = parity.memory.scores, parity.redis.scores
    assert m.event_id == r.event_id
    np.testing.assert_allclose(r.risk, m.risk, rtol=0, atol=1e-9)
    assert r.decision == m.decision
    assert r.reasons == m.reasons


def test_replay_statistics_equal(parity: Parity) -> None:
    assert parity.redis.stats == parity.memory.stats


def _same_number(name: str, a: float, b: float) -> bool:
    if "." in name:  # forward-decay sums: floats
        return math.isclose(a, b, rel_tol=1e-12, abs_tol=0.0)
    return a == b  # first/last seen and fan-out buckets: whole seconds


def test_profiles_equal_member_by_member(parity: Parity) -> None:
    for key, expected in parity.reference.items():
        got = parity.redis.profiles[key]
        assert got is not None, f"identifier of kind {key[0]} missing from Redis"
        want, have = expected.to_members(), got.to_members()
        assert sorted(have) == sorted(want), key[0]
        for name, value in want.items():
            assert _same_number(name, have[name], value), (key[0], name, have[name], value)


def _raw_values(parity: Parity) -> set[bytes]:
    events = parity.scenario.events
    rng = random.Random(9)
    values: set[bytes] = set()
    for column in (events.account_id, events.device_id, events.email, events.ip, events.phone):
        present = sorted({v.strip() for v in column if v and len(v.strip()) >= 6})
        for v in rng.sample(present, min(400, len(present))):
            values |= {v.encode(), v.lower().encode(), v.replace(" ", "").encode()}
    return values


def test_no_raw_identifier_at_rest(parity: Parity) -> None:
    """Privacy: keys and values hold digests, numbers and packed records only (DESIGN tenet 7)."""
    blob = b"\x00".join(b"\x00".join([key, *parts]) for key, (_, _, parts) in parity.dump.items())
    # Every e-mail of the invented world is under a reserved name (RFC 2606, RFC 6761).
    assert b".example" not in blob
    assert b".test" not in blob
    leaked = [v for v in _raw_values(parity) if v in blob]
    assert leaked == []


def test_every_key_has_a_lifetime_or_a_trim(parity: Parity) -> None:
    ttl_ms = parity.settings.scoring_config().ttl_s * 1000
    answer_ms = parity.settings.idempotency_ttl_s * 1000
    label_ms = parity.settings.label_horizon_s * 1000
    letters = set(KIND_LETTERS.values())
    seen: set[str] = set()
    for key, (kind, pttl, _) in parity.dump.items():
        name = key.decode()
        if name.startswith("es{") and name[3] in letters and name.endswith("}"):
            seen.add("identifier")
            assert kind == b"zset"
            assert 0 < pttl <= ttl_ms
        elif name.startswith("i{"):
            seen.add("answer")
            assert kind == b"string"
            assert 0 < pttl <= answer_ms
        elif name.startswith("lb{"):
            seen.add("label")
            assert kind == b"string"
            assert 0 < pttl <= label_ms
        elif kind == b"stream":
            seen.add("stream")  # bounded by trimming (MINID / MAXLEN), tested in test_redis_store
            assert name.startswith(("l{", "m{mature}")), name
        else:
            seen.add("meta")
            assert name in ("es{meta}:since", "es{model}:snapshot", "es{model}:version"), name
    assert seen == {"identifier", "answer", "label", "stream", "meta"}
