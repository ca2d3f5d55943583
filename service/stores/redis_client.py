"""Opening Redis clients for the store, and turning every Redis failure into `StoreUnavailable`.

Clients never retry with back-off (the library's default would retry for seconds, far past a
scoring budget): one immediate retry replaces a pooled connection that died while the server
restarted, so the client reconnects by itself once the server is back.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from typing import Any

from redis.asyncio import Redis, RedisCluster
from redis.asyncio.retry import Retry
from redis.backoff import NoBackoff
from redis.exceptions import RedisError

from service.config import Settings
from service.stores.base import StoreUnavailable

MIN_VERSION = (7, 0)
"""SET with both NX and GET, and EXPIRE NX, arrived in Redis 7.0."""

Client = Redis | RedisCluster


def make_client(settings: Settings, timeout_s: float) -> Client:
    """A client for ``settings.redis_url`` whose socket operations give up after ``timeout_s``."""
    if not settings.redis_url:
        raise StoreUnavailable("no Redis URL configured: set EMBERSCORE_REDIS_URL")
    options: dict[str, Any] = {
        "socket_timeout": timeout_s,
        "socket_connect_timeout": timeout_s,
        "retry": Retry(NoBackoff(), 1),
    }
    if settings.redis_cluster:
        return RedisCluster.from_url(settings.redis_url, **options)
    return Redis.from_url(settings.redis_url, **options)


@contextlib.asynccontextmanager
async def guard(what: str, timeout_s: float) -> AsyncIterator[None]:
    """Bound a Redis exchange by ``timeout_s`` and raise only `StoreUnavailable` out of it."""
    try:
        async with asyncio.timeout(timeout_s):
            yield
    except TimeoutError as exc:
        raise StoreUnavailable(
            f"Redis did not answer {what} within {timeout_s * 1000:.0f} ms"
        ) from exc
    except (RedisError, OSError) as exc:
        raise StoreUnavailable(f"Redis failed {what}: {type(exc).__name__}: {exc}") from exc


def _version(info: dict[Any, Any]) -> tuple[int, ...]:
    if "redis_version" not in info:  # a cluster answers per node: take the oldest
        return min(_version(node) for node in info.values())
    return tuple(int(part) for part in str(info["redis_version"]).split(".")[:2])


async def check_server(client: Client, timeout_s: float) -> None:
    """Raise `StoreUnavailable` unless the server answers and is recent enough."""
    async with guard("the connection check", timeout_s):
        if isinstance(client, RedisCluster):
            await client.initialize()
        info = await client.info("server")
    version = _version(info)
    if version < MIN_VERSION:
        raise StoreUnavailable(
            f"Redis {'.'.join(map(str, version))} is too old: emberscore needs Redis "
            f"{'.'.join(map(str, MIN_VERSION))} or newer (SET NX GET, EXPIRE NX)"
        )
