"""``emberscore backfill --warm``: the state at the end of the history, written into Redis.

A new deployment then starts from history instead of from nothing: every identifier still alive
at the end of the history gets its profile (`scoring.batch_state.final_profiles`), the model
snapshot is published as the learner would publish it, and the store's observed-since time is
set to the history's first event. Profiles are written in pipelines of `WARM_BATCH` identifiers,
each key replaced whole and given the lifetime it has left: the record lifetime minus the time
from its last event to the end of the history, as the live store's TTL would stand then.

Not written: learning records, stored answers and label marks of recent events (a label that
arrives after the warm-up for an event of the history is reported unknown by the learner).
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any

from scoring.config import ScoringConfig
from scoring.fusion import ModelSnapshot
from scoring.profile import Profile
from service.config import Settings
from service.stores.base import StoreUnavailable
from service.stores.redis_client import guard
from service.stores.redis_keys import SINCE_KEY, identifier_key

WARM_BATCH = 1000


class WarmError(Exception):
    """Redis could not be warmed; the message says why (never the URL: it may hold a password)."""


@dataclass(frozen=True)
class WarmResult:
    """What the warm-up wrote."""

    profiles: int
    model_version: int
    observed_since_s: float


def remaining_ttl_s(ttl_s: float, last_s: int | None, now_s: float) -> int:
    """Whole seconds of lifetime a record has left at ``now_s`` (at least 1).

    >>> remaining_ttl_s(7_776_000.0, 1_000, 1_000 + 86_400.0)
    7689600
    """
    used = 0.0 if last_s is None else now_s - last_s
    return max(1, math.ceil(ttl_s - used))


def _batches(
    profiles: Iterable[tuple[str, bytes, Profile]], size: int
) -> Iterator[list[tuple[str, bytes, Profile]]]:
    chunk: list[tuple[str, bytes, Profile]] = []
    for item in profiles:
        chunk.append(item)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


async def _write_profiles(
    client: Any,
    profiles: Iterable[tuple[str, bytes, Profile]],
    config: ScoringConfig,
    now_s: float,
    timeout_s: float,
) -> int:
    """Replace each key with its profile and the lifetime it has left; the count written."""
    written = 0
    for chunk in _batches(profiles, WARM_BATCH):
        pipe = client.pipeline(transaction=False)
        for kind, digest, profile in chunk:
            members = profile.to_members()
            if not members:
                continue
            key = identifier_key(kind, digest)
            pipe.delete(key)
            pipe.zadd(key, members)
            pipe.expire(key, remaining_ttl_s(config.ttl_s, profile.last_s, now_s))
            written += 1
        async with guard("a warm-up write", timeout_s):
            await pipe.execute()
    return written


async def _warm(
    settings: Settings,
    config: ScoringConfig,
    profiles: Iterable[tuple[str, bytes, Profile]],
    snapshot: ModelSnapshot,
    since_s: float,
    now_s: float,
) -> WarmResult:
    from service.stores.redis import RedisStore  # the Redis client only when asked for

    store = await RedisStore.connect(settings, config)
    try:
        count = await _write_profiles(store.background, profiles, config, now_s, store.slow_s)
        await store.save_snapshot(snapshot.to_bytes(), snapshot.version)
        async with guard("the observed-since write", store.slow_s):
            await store.background.set(SINCE_KEY, repr(float(since_s)))
    finally:
        await store.close()
    return WarmResult(count, snapshot.version, since_s)


def warm_redis(
    url: str,
    settings: Settings,
    profiles: Iterable[tuple[str, bytes, Profile]],
    snapshot: ModelSnapshot,
    since_s: float,
    now_s: float,
) -> WarmResult:
    """Write profiles, the model snapshot and the observed-since time into the Redis at ``url``.

    ``now_s`` is the end of the history: lifetimes left are counted from it.
    """
    target = settings.model_copy(update={"redis_url": url})
    config = settings.scoring_config()
    try:
        return asyncio.run(_warm(target, config, profiles, snapshot, since_s, now_s))
    except StoreUnavailable as exc:
        raise WarmError(f"could not warm Redis: {exc}") from None
    except ValueError:  # a URL the client cannot parse (its text may hold a password: not shown)
        raise WarmError(
            "could not warm Redis: the --warm URL is not a Redis URL "
            "(redis://host:port/db, rediss://... or unix://...)"
        ) from None
