"""Redis Cluster: the same replay on three masters gives the same scores as on one server.

Every pipeline the store sends goes through the cluster client, which refuses a command whose
keys hash to more than one slot and sends each command to the master owning its slot, so a
replay that completes without error shows each command is slot-valid. Redis Cluster hashes only
the part of a key between the first ``{`` and the next ``}`` (the hash tag; Redis Cluster
specification, "Hash tags"): the keys checked below must spread over every master.
"""

from __future__ import annotations

import asyncio
from typing import Any

import numpy as np
import pytest
import redis

from service.replay import event_at, replay
from service.stores.redis import RedisStore
from service.stores.redis_keys import identifier_key

pytestmark = [pytest.mark.redis, pytest.mark.slow]


async def _replay(kit: Any, url: str, cluster: bool, scenario: Any) -> tuple[Any, Any, Any]:
    settings = kit.settings(url, redis_cluster=cluster)
    store = await RedisStore.connect(settings, settings.scoring_config())
    try:
        engine = kit.engine(store, settings)
        scores, stats = await replay(engine, scenario.events, scenario.labels)
        await store.flush()
        assert store.counters["failed"] == 0, store.writer.last_error
        keys = sorted(engine.planner.plan(e).identifiers[0] for e in _events(scenario, 200))
        profiles = {key: await store.profile(*key) for key in keys}
        await store.enqueue_labels([(b"\x01" * 8, True, 1.0)])
        queued = await store.read_labels("cluster-test", 10, 10)
        assert len(queued) == 1
        await store.ack_labels([entry_id for entry_id, *_ in queued])
        await store.save_snapshot(b"snapshot-bytes", 4)
        assert await store.snapshot_version() == 4
        assert await store.load_snapshot() == b"snapshot-bytes"
        await store.append_shadow("evt-1", 1.0, 0.5, "review", "allow")
        assert len(await store.read_shadow()) == 1
    finally:
        await store.close()
    return scores, stats, profiles


def _events(scenario: Any, n: int) -> list[Any]:
    return [event_at(scenario.events, i) for i in range(0, len(scenario.events), 7)][:n]


def test_cluster_replay_equals_single_node(
    kit: Any, redis_url: str, redis_cluster_url: str, redis_cluster: list[Any]
) -> None:
    scenario = kit.world(3_000, seed=31)
    single = asyncio.run(_replay(kit, redis_url, False, scenario))
    clustered = asyncio.run(_replay(kit, redis_cluster_url, True, scenario))
    np.testing.assert_array_equal(clustered[0].risk, single[0].risk)
    assert clustered[0].decision == single[0].decision
    assert clustered[1] == single[1]
    assert clustered[2] == single[2]
    assert all(p is not None for p in clustered[2].values())
    for node in redis_cluster:
        with node.client() as c:
            assert c.dbsize() > 0, "a master holds no key: hash tags do not spread"


def test_identifier_keys_spread_over_slots(redis_cluster: list[Any]) -> None:
    """Each identifier is its own hash tag, so identifiers spread over every master."""
    with redis.Redis(port=redis_cluster[0].port) as c:
        slots = {
            c.execute_command("CLUSTER", "KEYSLOT", identifier_key("device", i.to_bytes(8, "big")))
            for i in range(300)
        }
    assert len(slots) > 250  # 300 tags into 16,384 slots: few collisions
