"""The Redis store against a real redis-server: idempotency, lifetimes, labels, queues, cursors.

The embedded `MemoryStore` is the reference semantics; each test says which behaviour it pins.
"""

from __future__ import annotations

import asyncio
import math
import socket
import time
from collections.abc import Awaitable, Callable
from typing import Any

import pytest
import redis

from scoring.event import Event
from scoring.profile import Profile
from service.engine import InFlight
from service.replay import event_at
from service.stores.base import StoreUnavailable
from service.stores.redis import RedisStore
from service.stores.redis_keys import answer_key, identifier_key, label_key, record_stream_key
from service.workers.learner import LabelOutcome

pytestmark = pytest.mark.redis


def run(
    kit: Any, url: str, body: Callable[[RedisStore, Any], Awaitable[Any]], **overrides: Any
) -> Any:
    """Run ``body(store, settings)`` on a fresh store, closing it afterwards."""
    settings = kit.settings(url, **overrides)

    async def main() -> Any:
        store = await RedisStore.connect(settings, settings.scoring_config())
        try:
            return await body(store, settings)
        finally:
            await store.close()

    return asyncio.run(main())


def zsets(url: str) -> dict[bytes, dict[bytes, float]]:
    """Every identifier sorted set on the server, member -> score."""
    with redis.Redis.from_url(url) as c:
        return {
            key: dict(c.zrange(key, 0, -1, withscores=True))
            for key in c.scan_iter(match="es{*}", count=1000)
            if c.type(key) == b"zset"
        }


def assert_same_zsets(
    got: dict[bytes, dict[bytes, float]], want: dict[bytes, dict[bytes, float]]
) -> None:
    assert sorted(got) == sorted(want)
    for key, members in want.items():
        assert sorted(got[key]) == sorted(members), key
        for name, value in members.items():
            if b"." in name:  # forward-decay sums: equal up to the rounding of an undo
                assert math.isclose(got[key][name], value, rel_tol=1e-12), (key, name)
            else:  # whole seconds
                assert got[key][name] == value, (key, name)


def event(i: int, ts_s: float, **fields: Any) -> Event:
    return Event(f"evt-{i}", ts_s, "checkout", **fields)


# -- idempotency -------------------------------------------------------------------------------


def test_retry_returns_first_answer_and_counts_nothing_twice(kit: Any, redis_url: str) -> None:
    """A retried event id answers from the stored answer; its writes are taken back."""
    scenario = kit.world(1_500, seed=4)
    events = [event_at(scenario.events, i) for i in range(len(scenario.events))]

    async def once(store: RedisStore, settings: Any) -> None:
        engine = kit.engine(store, settings)
        for e in events:
            await engine.score(e)
        await store.flush()

    async def with_retries(store: RedisStore, settings: Any) -> int:
        engine = kit.engine(store, settings)
        retried = 0
        for i, e in enumerate(events):
            first = await engine.score(e)
            if i % 5 == 0:
                await store.flush()  # the answer is written behind the request
                again = await engine.score(e)
                assert again.duplicate
                # Stored answers keep the 6 decimals that answers give.
                expected = (round(first.risk, 6), first.decision, first.reasons)
                assert (again.risk, again.decision, again.reasons) == expected
                retried += 1
        await store.flush()
        return retried

    run(kit, redis_url, once)
    reference = zsets(redis_url)
    with redis.Redis.from_url(redis_url) as c:
        c.flushall()
    assert run(kit, redis_url, with_retries) > 200
    assert_same_zsets(zsets(redis_url), reference)


def test_concurrent_duplicate_is_in_flight(kit: Any, redis_url: str) -> None:
    """While the first request for an event id is being scored, a second one gets InFlight and
    leaves the statistics as one event made them."""
    e = event(1, 1_790_000_000.0, account_id="acct-in-flight", device_id="dev-in-flight")

    async def body(store: RedisStore, settings: Any) -> None:
        engine = kit.engine(store, settings)
        plan = engine.planner.plan(e)
        begun = await store.begin(plan, read=True)  # the first request, not committed yet
        assert begun.duplicate is None
        assert begun.profiles == [None, None]
        with pytest.raises(InFlight):
            await engine.score(e)
        changes = zip(plan.identifiers, plan.hits, plan.amounts, strict=True)
        for (kind, digest), hits, amount in changes:
            expected = Profile(store.config)
            expected.record(plan.basis, hits, amount)
            assert await store.profile(kind, digest) == expected

    run(kit, redis_url, body)


# -- lifetimes ---------------------------------------------------------------------------------


def test_lifetimes_of_identifier_answer_and_label_keys(kit: Any, redis_url: str) -> None:
    e = event(2, 1_790_000_000.0, account_id="acct-ttl", device_id="dev-ttl")

    async def body(store: RedisStore, settings: Any) -> tuple[Any, bytes]:
        engine = kit.engine(store, settings)
        await engine.score(e)
        await store.flush()
        plan = engine.planner.plan(e)
        assert await store.set_label(plan.event_digest, True) is None
        return plan, plan.event_digest

    plan, digest = run(kit, redis_url, body)
    settings = kit.settings(redis_url)
    with redis.Redis.from_url(redis_url) as c:
        for kind, d in plan.identifiers:
            ttl = c.ttl(identifier_key(kind, d))
            assert settings.scoring_config().ttl_s - 60 < ttl <= settings.scoring_config().ttl_s
        answer_ttl = c.pttl(answer_key(digest))
        assert (
            settings.idempotency_ttl_s * 1000 - 60_000
            < answer_ttl
            <= settings.idempotency_ttl_s * 1000
        )
        assert c.get(answer_key(digest)) not in (None, b"")  # the answer replaced the claim
        label_ttl = c.ttl(label_key(digest))
        assert settings.label_horizon_s - 60 < label_ttl <= settings.label_horizon_s


def test_streams_are_trimmed(kit: Any, redis_url: str) -> None:
    """Learning records older than the label horizon and shadow lines past the cap are dropped
    (approximate trimming: whole stream nodes of 100 entries, Redis's default node size)."""

    async def body(store: RedisStore, settings: Any) -> tuple[int, int, int]:
        engine = kit.engine(store, settings)
        for i in range(300):
            await engine.record(event(i, 1_790_000_000.0 + i, account_id=f"acct-trim-{i}"))
        for i in range(500):
            await store.append_shadow(f"evt-{i}", float(i), 0.1, "allow", "allow")
        await store.flush()
        with redis.Redis.from_url(redis_url) as c:
            before = c.xlen(record_stream_key(0))
            time.sleep(1.2)  # past the one-second horizon of this test
            await engine.record(event(999, 1_790_001_000.0, account_id="acct-trim-last"))
            await store.flush()
            return before, c.xlen(record_stream_key(0)), c.xlen("es{shadow}")

    before, after, shadow = run(
        kit, redis_url, body, log_shards=1, label_horizon_s=1.0, shadow_log_max=50
    )
    assert before == 300
    assert after <= 101
    assert shadow < 500


# -- labels ------------------------------------------------------------------------------------


def test_label_applied_once_when_delivered_twice(kit: Any, redis_url: str) -> None:
    """The same label twice counts once; a changed label replaces the earlier one."""
    e = event(3, 1_790_000_000.0, account_id="acct-label", device_id="dev-label")

    async def body(store: RedisStore, settings: Any) -> None:
        engine = kit.engine(store, settings)
        await engine.score(e)
        plan = engine.planner.plan(e)
        await store.enqueue_labels([(plan.event_digest, True, 1.0), (plan.event_digest, True, 2.0)])
        delivered = await store.read_labels("learner-1", 10, 10)
        outcomes = [await engine.learner.apply_label(d, f) for _, d, f, _ in delivered]
        assert outcomes == [LabelOutcome.APPLIED, LabelOutcome.DUPLICATE]
        await store.ack_labels([entry_id for entry_id, *_ in delivered])
        account = await store.profile(*plan.identifiers[0])
        assert account is not None
        assert sum(account.bad.values()) == pytest.approx(plan.basis.label_factor, rel=1e-15)
        assert await engine.learner.apply_label(plan.event_digest, False) is LabelOutcome.CHANGED
        account = await store.profile(*plan.identifiers[0])
        assert account is not None
        assert abs(sum(account.bad.values())) <= 1e-12 * plan.basis.label_factor
        assert sum(account.good.values()) == pytest.approx(plan.basis.label_factor, rel=1e-15)
        assert await store.get_label(plan.event_digest) is False

    run(kit, redis_url, body)


def test_label_on_expired_identifier_creates_nothing(kit: Any, redis_url: str) -> None:
    async def body(store: RedisStore, settings: Any) -> None:
        engine = kit.engine(store, settings)
        plan = engine.planner.plan(event(4, 1_790_000_000.0, account_id="acct-gone"))
        await store.add_label(plan.identifiers, plan.basis, True, 1.0)
        assert await store.profile(*plan.identifiers[0]) is None

    run(kit, redis_url, body)


def test_unacknowledged_labels_are_redelivered_after_a_crash(kit: Any, redis_url: str) -> None:
    """A learner that read labels and died before acknowledging gets them again."""
    labels = [(bytes([i]) * 8, i % 2 == 0, 100.0 + i) for i in range(3)]

    async def crashed(store: RedisStore, settings: Any) -> list[Any]:
        await store.enqueue_labels(labels)
        return await store.read_labels("learner-1", 10, 10)  # ...and no ack

    async def restarted(store: RedisStore, settings: Any) -> tuple[list[Any], list[Any], list[Any]]:
        again = await store.read_labels("learner-1", 10, 10)
        other = await store.read_labels("learner-2", 10, 10)
        await store.ack_labels([entry_id for entry_id, *_ in again])
        return again, other, await store.read_labels("learner-1", 10, 10)

    first = run(kit, redis_url, crashed)
    again, other, after_ack = run(kit, redis_url, restarted)
    assert [(d, f, t) for _, d, f, t in first] == labels
    assert again == first
    assert other == []
    assert after_ack == []


def test_pending_labels_trimmed_meanwhile_are_skipped(kit: Any, redis_url: str) -> None:
    """A pending label whose entry left the stream (trimmed past the horizon) is acknowledged
    and skipped; it must not stop the learner from getting the labels after it."""
    labels = [(bytes([i]) * 8, True, 200.0 + i) for i in range(3)]

    async def crashed(store: RedisStore, settings: Any) -> list[Any]:
        await store.enqueue_labels(labels[:2])
        return await store.read_labels("learner-1", 10, 10)

    delivered = run(kit, redis_url, crashed)
    with redis.Redis.from_url(redis_url) as c:
        c.xdel("es{labels}", delivered[0][0])  # as trimming would

    async def restarted(store: RedisStore, settings: Any) -> tuple[list[Any], list[Any]]:
        survivors = await store.read_labels("learner-1", 10, 10)
        await store.ack_labels([entry_id for entry_id, *_ in survivors])
        await store.enqueue_labels(labels[2:])
        return survivors, await store.read_labels("learner-1", 10, 10)

    survivors, new = run(kit, redis_url, restarted)
    assert survivors == delivered[1:]
    assert [(d, f, t) for _, d, f, t in new] == labels[2:]


# -- maturity queue ------------------------------------------------------------------------------


def test_due_returns_oldest_first_and_resumes_after_restart(kit: Any, redis_url: str) -> None:
    t0 = 1_790_000_000.0

    async def first(store: RedisStore, settings: Any) -> list[Any]:
        engine = kit.engine(store, settings)
        for i in range(5):
            plan = engine.planner.plan(event(10 + i, t0 + i, account_id=f"acct-due-{i}"))
            await store.begin(plan, read=False)
            await store.commit(plan, None, b"record-%d" % i, t0 + 100 + i)
        assert await store.due(t0 + 99) == []
        return await store.due(t0 + 101.5)

    async def second(store: RedisStore, settings: Any) -> tuple[list[Any], list[Any]]:
        return await store.due(t0 + 1_000), await store.due(t0 + 2_000)

    head = run(kit, redis_url, first)
    rest, nothing = run(kit, redis_url, second)
    assert [m.record for m in head] == [b"record-0", b"record-1"]
    assert [m.record for m in rest] == [b"record-2", b"record-3", b"record-4"]
    assert nothing == []


# -- records, snapshots, profiles ------------------------------------------------------------------


def test_snapshot_record_erase_and_since(kit: Any, redis_url: str) -> None:
    async def body(store: RedisStore, settings: Any) -> None:
        assert await store.snapshot_version() is None
        assert await store.load_snapshot() is None
        await store.save_snapshot(b"\x00model", 7)
        assert (await store.snapshot_version(), await store.load_snapshot()) == (7, b"\x00model")
        engine = kit.engine(store, settings)
        e = event(20, 1_790_000_500.0, account_id="acct-erase")
        await engine.score(e)
        plan = engine.planner.plan(e)
        assert await store.load_record(plan.event_digest) is not None
        assert await store.load_record(b"\xff" * 8) is None
        assert await store.erase(*plan.identifiers[0]) is True
        assert await store.profile(*plan.identifiers[0]) is None
        assert await store.erase(*plan.identifiers[0]) is False
        assert await store.ping() is True

    async def later_process(store: RedisStore, settings: Any) -> Any:
        engine = kit.engine(store, settings)
        plan = engine.planner.plan(event(21, 1_790_009_999.0, account_id="acct-later"))
        return (await store.begin(plan, read=True)).observed_since_s

    run(kit, redis_url, body)
    assert run(kit, redis_url, later_process) == 1_790_000_500.0


def test_warm_writes_whole_profiles(kit: Any, redis_url: str) -> None:
    """Profiles computed elsewhere (the backfill) load as they are, with the lifetime left."""
    settings = kit.settings(redis_url)
    memory = kit.memory_store(settings)
    scenario = kit.world(1_000, seed=8)

    async def fill() -> None:
        from service.replay import replay

        await replay(kit.engine(memory, settings), scenario.events, scenario.labels)

    asyncio.run(fill())
    items = [(kind, digest, p) for (kind, digest), p in memory.profiles.items()]
    ttl_s = settings.scoring_config().ttl_s
    oldest = min(range(len(items)), key=lambda i: items[i][2].last_s or 0)
    last_s = items[oldest][2].last_s
    assert last_s is not None
    now_s = last_s + ttl_s - 3_600.0  # the least recent profile has 3,600 s left, others more

    async def body(store: RedisStore, settings: Any) -> int:
        written = await store.warm(items, now_s, batch=100)
        assert await store.warm(items[:10], now_s) == 10  # replaces, does not add
        for kind, digest, p in items:
            assert await store.profile(kind, digest) == p
        return written

    assert run(kit, redis_url, body) == len(items)
    with redis.Redis.from_url(redis_url) as c:
        kind, digest, _ = items[oldest]
        assert 3_500 < c.ttl(identifier_key(kind, digest)) <= 3_600


def test_shadow_log_reads_back(kit: Any, redis_url: str) -> None:
    async def body(store: RedisStore, settings: Any) -> Any:
        await store.append_shadow("evt-a", 10.0, 0.125, "allow", "review")
        await store.append_shadow("evt-b", 11.5, 0.875, "deny", None)
        return await store.read_shadow()

    table = run(kit, redis_url, body)
    assert table.event_id == ["evt-a", "evt-b"]
    assert list(table.ts_s) == [10.0, 11.5]
    assert list(table.risk) == [0.125, 0.875]
    assert table.decision == ["allow", "deny"]
    assert table.reasons == ["", ""]
    assert table.current_decision == ["review", None]


def test_connect_errors_are_store_unavailable(kit: Any) -> None:
    settings = kit.settings(None)
    with pytest.raises(StoreUnavailable, match="EMBERSCORE_REDIS_URL"):
        asyncio.run(RedisStore.connect(settings, settings.scoring_config()))
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    closed = kit.settings(f"redis://127.0.0.1:{port}/0")
    with pytest.raises(StoreUnavailable, match="connection check"):
        asyncio.run(RedisStore.connect(closed, closed.scoring_config()))
