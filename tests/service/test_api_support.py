"""Helpers shared by the HTTP tests (this module holds no tests of its own).

`running` starts the real application (lifespan included) and gives an httpx client that talks
to it in-process over ASGI, so tests can send concurrent requests. `FaultyStore` wraps a real
store and injects faults into chosen calls (mocks only to inject faults). All data is invented.
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

SECRET = "invented-test-secret-0001"
T0 = 3_786_912_000.0  # 2090-01-01T00:00:00Z: later than the wall clock, so reads are at event time
T0_ISO = "2090-01-01T00:00:00Z"


def settings(**overrides: Any) -> Settings:
    """Settings for tests: no environment file, a test secret, then ``overrides``."""
    values: dict[str, Any] = {"hash_secret": SECRET}
    values.update(overrides)
    return Settings(_env_file=None, **values)  # type: ignore[call-arg]


def event(n: int = 1, **fields: Any) -> dict[str, Any]:
    """An invented checkout, ``n`` seconds after `T0`, with every identifier field set."""
    body: dict[str, Any] = {
        "event_id": f"ev-{n}",
        "ts": T0 + n,
        "type": "checkout",
        "account_id": f"acct-{n}",
        "ip": "11.22.33.44",
        "device_id": "dev-alpha",
        "phone": "+44 20 7946 0321",
        "email": f"shopper{n}@quillpost.example",
        "amount": 42.5,
    }
    body.update(fields)
    return body


@contextlib.asynccontextmanager
async def running(
    config: Settings | None = None, headers: dict[str, str] | None = None
) -> AsyncIterator[tuple[httpx.AsyncClient, FastAPI]]:
    """The application with its lifespan running, and a client for it."""
    app = create_app(config or settings())
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(
            transport=transport, base_url="http://emberscore.test", headers=headers
        ) as client:
            yield client, app


def runtime_of(app: FastAPI) -> Runtime:
    runtime: Runtime = app.state.runtime
    return runtime


async def unavailable() -> None:
    raise StoreUnavailable("injected fault: store unreachable")


def stall(seconds: float) -> Callable[[], Awaitable[None]]:
    async def wait() -> None:
        await asyncio.sleep(seconds)

    return wait


def wait_for(
    gate: asyncio.Event, entered: asyncio.Event | None = None
) -> Callable[[], Awaitable[None]]:
    async def wait() -> None:
        if entered is not None:
            entered.set()
        await gate.wait()

    return wait


class FaultyStore:
    """A real store with faults injected before chosen calls.

    ``faults`` maps a method name to an async callable run before the real method (raise to
    fail the call, sleep to slow it). ``calls`` records the names called, in order.
    """

    def __init__(self, inner: Any, faults: dict[str, Callable[[], Awaitable[None]]]) -> None:
        self.inner = inner
        self.faults = faults
        self.calls: list[str] = []

    def __getattr__(self, name: str) -> Any:
        real = getattr(self.inner, name)
        if not callable(real):
            return real

        async def call(*args: Any, **kwargs: Any) -> Any:
            self.calls.append(name)
            fault = self.faults.get(name)
            if fault is not None:
                await fault()
            return await real(*args, **kwargs)

        return call


def inject(app: FastAPI, faults: dict[str, Callable[[], Awaitable[None]]]) -> FaultyStore:
    """Put a `FaultyStore` around the running app's store; returns it."""
    runtime = runtime_of(app)
    faulty = FaultyStore(runtime.store, faults)
    runtime.store = faulty
    runtime.engine.store = faulty  # type: ignore[assignment]
    return faulty
