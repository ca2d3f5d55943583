"""The scoring budget against a real redis-server that stops, freezes and comes back.

The server is this test's own (`own_redis` in tests/conftest.py), stopped by its process id in
the middle of the test and started again on the same port. Every request is also wrapped in a
5 s guard that only catches a hang; no test asserts a duration.
"""

from __future__ import annotations

import asyncio
import os
import signal
from typing import Any

import pytest
from test_service_redis_support import event, eventually, redis_settings, running

pytestmark = [pytest.mark.redis, pytest.mark.anyio]
HANG_GUARD_S = 5.0


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


async def _score(client: Any, n: int) -> Any:
    return await asyncio.wait_for(client.post("/v1/score", json=event(n)), HANG_GUARD_S)


async def test_fail_open_while_the_server_is_stopped_then_back(own_redis: Any) -> None:
    config = redis_settings(own_redis.url, score_budget_ms=50, on_store_failure="open")
    async with running(config) as (client, _):
        before = await _score(client, 1)
        own_redis.stop()
        during = [await _score(client, n) for n in (2, 3)]
        ready_during = await client.get("/readyz")
        own_redis.start()

        async def recovered() -> bool:
            reply = await _score(client, 100 + len(seen))
            seen.append(reply.json())
            return bool(reply.json()["state_available"])

        seen: list[dict[str, Any]] = []
        assert await eventually(recovered)
        metrics = (await client.get("/metrics")).text
    assert before.json()["state_available"] is True
    for reply in during:
        assert reply.status_code == 200
        assert reply.json()["state_available"] is False
    assert ready_during.status_code == 503
    assert ready_during.json()["store"].startswith("unreachable")
    assert "emberscore_fail_open_answers_total" in metrics


async def test_fail_closed_while_the_server_is_stopped(own_redis: Any) -> None:
    config = redis_settings(own_redis.url, score_budget_ms=50, on_store_failure="closed")
    async with running(config) as (client, _):
        assert (await _score(client, 1)).status_code == 200
        own_redis.stop()
        down = await _score(client, 2)
        own_redis.start()

        async def recovered() -> bool:
            return bool((await _score(client, 3)).status_code == 200)

        assert await eventually(recovered)
    assert down.status_code == 503
    assert down.json()["detail"].startswith("the store is unavailable (scoring)")


async def test_a_frozen_server_costs_one_budget_not_a_hang(own_redis: Any) -> None:
    """SIGSTOP leaves connections open with no answer: only the budget can end the request."""
    config = redis_settings(own_redis.url, score_budget_ms=50, on_store_failure="open")
    async with running(config) as (client, _):
        assert (await _score(client, 1)).json()["state_available"] is True
        pid = own_redis.process.pid
        os.kill(pid, signal.SIGSTOP)
        try:
            frozen = await _score(client, 2)
        finally:
            os.kill(pid, signal.SIGCONT)

        async def recovered() -> bool:
            return bool((await _score(client, 3)).json()["state_available"])

        assert await eventually(recovered)
        metrics = (await client.get("/metrics")).text
    assert frozen.status_code == 200
    assert frozen.json()["state_available"] is False
    assert 'operation="score"} 1.0' in metrics  # one store error (timeout or unavailable)


async def test_service_starts_without_redis_and_connects_when_it_appears(own_redis: Any) -> None:
    own_redis.stop()
    config = redis_settings(own_redis.url, score_budget_ms=50, on_store_failure="open")
    async with running(config) as (client, _):
        early = await _score(client, 1)
        not_ready = await client.get("/readyz")
        own_redis.start()

        async def ready() -> bool:
            return (await client.get("/readyz")).status_code == 200

        assert await eventually(ready)
        late = await _score(client, 2)
    assert early.json()["state_available"] is False
    assert not_ready.status_code == 503
    assert not_ready.json()["model"].startswith("not loaded yet")
    assert late.json()["state_available"] is True
