"""Helpers for the HTTP service tests against a real redis-server (no tests here).

The servers come from the session fixtures in tests/conftest.py (`redis_url`, `own_redis`).
`FaultyStore` injects faults into chosen calls of the real `RedisStore` (mocks only to inject
faults). All data is invented.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import Any

import httpx
from fastapi import FastAPI

from service.app import create_app
from service.config import Settings
from service.routes.deps import Runtime
from service.stores.base import StoreUnavailable

SECRET = "invented-integration-secret-0002"
T0 = 1_790_000_000.0  # 2026-09-21T14:13:20Z


def redis_settings(url: str | None, **overrides: Any) -> Settings:
    values: dict[str, Any] = {
        "redis_url": url,
        "hash_secret": SECRET,
        "score_budget_ms": 5000.0,
        "model_poll_s": 0.05,
    }
    values.update(overrides)
    return Settings(_env_file=None, **values)  # type: ignore[call-arg]


def event(n: int, **fields: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "event_id": f"ev-{n}",
        "ts": T0 + n,
        "type": "signup",
        "account_id": f"acct-{n}",
        "ip": "11.22.33.44",
        "device_id": "dev-shared",
        "phone": "+44 20 7946 0321",
        "email": f"member{n}@quillpost.example",
    }
    body.update(fields)
    return body


@contextlib.asynccontextmanager
async def running(config: Settings) -> AsyncIterator[tuple[httpx.AsyncClient, FastAPI]]:
    """The application with its lifespan running, and an in-process client for it."""
    app = create_app(config)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://emberscore.test") as c:
            yield c, app


def runtime_of(app: FastAPI) -> Runtime:
    runtime: Runtime = app.state.runtime
    return runtime


async def flush(app: FastAPI) -> None:
    """Wait for the store's writes behind the request path (answers, records, shadow lines)."""
    await runtime_of(app).store.flush()


async def eventually(check: Callable[[], Awaitable[bool]], attempts: int = 200) -> bool:
    """Poll ``check`` every 50 ms until it is true (False after ``attempts``)."""
    for _ in range(attempts):
        if await check():
            return True
        await asyncio.sleep(0.05)
    return False


async def unavailable() -> None:
    raise StoreUnavailable("injected fault: store unreachable")


class FaultyStore:
    """A real store with an async fault run before chosen calls (raise to fail them)."""

    def __init__(self, inner: Any, faults: dict[str, Callable[[], Awaitable[None]]]) -> None:
        self.inner = inner
        self.faults = faults

    def __getattr__(self, name: str) -> Any:
        real = getattr(self.inner, name)
        if not callable(real) or name not in self.faults:
            return real

        async def call(*args: Any, **kwargs: Any) -> Any:
            await self.faults[name]()
            return await real(*args, **kwargs)

        return call
