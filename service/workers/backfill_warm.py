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
from collections.abc import Iterable
from dataclasses import dataclass

from scoring.config import ScoringConfig
from scoring.fusion import ModelSnapshot
from scoring.profile import Profile
from service.config import Settings
from service.stores.base import StoreUnavailable
from service.stores.redis_client import guard
from service.stores.redis_keys import SINCE_KEY

WARM_BATCH = 1000


class WarmError(Exception):
    """Redis could not be warmed; the message says why (never the URL: it may hold a password)."""


@dataclass(frozen=True)
class WarmResult:
    """What the warm-up wrote."""

    profiles: int
    model_version: int
    observed_since_s: float


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
        count = await store.warm(profiles, now_s, WARM_BATCH)
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
