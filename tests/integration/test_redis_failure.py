"""Failure: a Redis that is gone or hung makes the store raise `StoreUnavailable` (never a Redis
exception, never a hang), and the store works again by itself once the server is back.

The server is one this test started; it is stopped, frozen and resumed by its own process id.
`HANG_GUARD_S` only turns a hang into a failure: the test asserts no duration.
"""

from __future__ import annotations

import asyncio
import os
import signal
from typing import Any

import pytest

from scoring.event import Event
from service.stores.base import StoreUnavailable
from service.stores.redis import RedisStore

pytestmark = pytest.mark.redis

HANG_GUARD_S = 30.0


def _event(i: int) -> Event:
    return Event(f"evt-fail-{i}", 1_790_000_000.0 + i, "login", account_id=f"acct-fail-{i % 3}")


async def _begin(store: RedisStore, engine: Any, i: int) -> Any:
    return await asyncio.wait_for(
        store.begin(engine.planner.plan(_event(i)), read=True), HANG_GUARD_S
    )


def test_stopped_server_then_restart(kit: Any, own_redis: Any) -> None:
    settings = kit.settings(own_redis.url, score_budget_ms=250.0)

    async def main() -> None:
        store = await RedisStore.connect(settings, settings.scoring_config())
        engine = kit.engine(store, settings)
        try:
            assert (await _begin(store, engine, 1)).duplicate is None
            own_redis.stop()
            with pytest.raises(StoreUnavailable):
                await _begin(store, engine, 2)
            assert await store.ping() is False
            plan = engine.planner.plan(_event(3))
            await store.commit(plan, b"answer", b"record", None)  # written behind: no raise
            await asyncio.wait_for(store.flush(), HANG_GUARD_S)
            assert store.counters["failed"] >= 1
            own_redis.start()  # same port, empty (no persistence in tests)
            assert (await _begin(store, engine, 4)).profiles == [None]
            assert await store.ping() is True
        finally:
            await store.close()

    asyncio.run(main())


def test_hung_server_times_out_within_the_budget(kit: Any, own_redis: Any) -> None:
    """A server that accepts nothing (frozen with SIGSTOP) costs a request its budget, no more."""
    settings = kit.settings(own_redis.url, score_budget_ms=200.0)

    async def main() -> None:
        store = await RedisStore.connect(settings, settings.scoring_config())
        engine = kit.engine(store, settings)
        pid = own_redis.process.pid
        try:
            await _begin(store, engine, 1)
            os.kill(pid, signal.SIGSTOP)
            try:
                with pytest.raises(StoreUnavailable, match="within 200 ms"):
                    await _begin(store, engine, 2)
            finally:
                os.kill(pid, signal.SIGCONT)
            assert (await _begin(store, engine, 5)).duplicate is None
        finally:
            await store.close()

    asyncio.run(main())
