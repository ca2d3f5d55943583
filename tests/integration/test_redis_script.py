"""The two forms of an event's round trip on a real redis-server: one script per identifier
(single server) and plain commands (cluster, or a server that refuses scripts).

- Both forms leave the same state, bit for bit, and give the same scores: the cluster path
  stays a faithful twin of the single-server one (DESIGN.md, "Stores").
- A server that lost the script (SCRIPT FLUSH, as after a restart) gets it again without the
  event's claim being sent twice (no false "being scored" 409).
- A server whose ACL refuses scripting is served with plain commands.
- Numbers reach ZINCRBY inside the script as the text the client sent: Redis adds them in IEEE
  754 binary64 exactly as Python does (Redis command reference, ZINCRBY: "double precision
  floating point number"; Lua numbers would print with only 14 significant digits, Lua 5.1
  reference manual, ``tostring`` / ``LUA_NUMBER_FMT "%.14g"``, quoted from memory).
"""

from __future__ import annotations

import asyncio
import struct
from typing import Any

import pytest
import redis
from hypothesis import given, settings
from hypothesis import strategies as st
from redis.asyncio.connection import DefaultParser
from redis.utils import HIREDIS_AVAILABLE

from service.replay import event_at, replay
from service.stores.redis import RedisStore
from service.stores.redis_keys import ProfileWrites
from service.stores.redis_script import PROFILE_UPDATE, PROFILE_UPDATE_SHA, ScriptCalls

pytestmark = pytest.mark.redis


def _bits(x: float) -> bytes:
    return struct.pack(">d", x)


def identifier_state(url: str, ttl_s: float) -> dict[bytes, dict[bytes, bytes]]:
    """Every identifier sorted set, member -> score bits (each with a lifetime of its own)."""
    out: dict[bytes, dict[bytes, bytes]] = {}
    with redis.Redis.from_url(url) as c:
        for key in c.scan_iter(match="es{*", count=1000):
            if c.type(key) != b"zset":
                continue
            out[key] = {m: _bits(s) for m, s in c.zrange(key, 0, -1, withscores=True)}
            assert 0 < c.ttl(key) <= ttl_s, key
    return out


async def _replay(kit: Any, url: str, scripted: bool, scenario: Any) -> Any:
    settings_ = kit.settings(url)
    store = await RedisStore.connect(settings_, settings_.scoring_config())
    if not scripted:
        store.exchange.wire = None  # the cluster's form, on this single server
    try:
        assert store.exchange.scripted is scripted
        scores, _ = await replay(kit.engine(store, settings_), scenario.events, scenario.labels)
        await store.flush()
        assert store.counters["failed"] == 0
    finally:
        await store.close()
    return scores


def test_scripted_and_plain_forms_leave_the_same_state_bit_for_bit(
    kit: Any, redis_url: str
) -> None:
    scenario = kit.world(3_000, seed=41)
    ttl_s = kit.settings(redis_url).scoring_config().ttl_s
    plain_scores = asyncio.run(_replay(kit, redis_url, False, scenario))
    plain = identifier_state(redis_url, ttl_s)
    with redis.Redis.from_url(redis_url) as c:
        c.flushall()
    scripted_scores = asyncio.run(_replay(kit, redis_url, True, scenario))
    scripted = identifier_state(redis_url, ttl_s)
    assert len(plain) > 1_000
    assert scripted == plain
    assert list(scripted_scores.risk) == list(plain_scores.risk)
    assert scripted_scores.reasons == plain_scores.reasons


def test_a_lost_script_is_loaded_again_and_the_claim_is_sent_once(kit: Any, redis_url: str) -> None:
    scenario = kit.world(1_000, seed=42)
    events = [event_at(scenario.events, i) for i in range(40)]
    settings_ = kit.settings(redis_url)

    async def main() -> None:
        store = await RedisStore.connect(settings_, settings_.scoring_config())
        engine = kit.engine(store, settings_)
        admin = redis.asyncio.Redis.from_url(redis_url)
        try:
            for i, event in enumerate(events):
                if i % 10 == 5:
                    await admin.script_flush()  # as a restarted server would have it
                result = await engine.score(event)
                assert not result.duplicate  # the claim went once: no "being scored" 409
            assert (await admin.script_exists(PROFILE_UPDATE_SHA)) == [True]
            await store.flush()
            again = await engine.score(events[3])
            assert again.duplicate
        finally:
            await admin.aclose()
            await store.close()

    asyncio.run(main())


def test_a_server_that_refuses_scripts_gets_plain_commands(kit: Any, redis_server: Any) -> None:
    """An ACL user without the scripting category (Redis ACL documentation, ``-@scripting``)."""
    with redis_server.client() as c:
        c.execute_command("ACL", "SETUSER", "noscripts", "on", ">pw", "~*", "&*", "+@all")
        c.execute_command("ACL", "SETUSER", "noscripts", "-@scripting")
    url = f"redis://noscripts:pw@127.0.0.1:{redis_server.port}/0"
    settings_ = kit.settings(url)
    scenario = kit.world(1_000, seed=43)

    async def main() -> None:
        store = await RedisStore.connect(settings_, settings_.scoring_config())
        try:
            assert not store.exchange.scripted
            engine = kit.engine(store, settings_)
            for i in range(20):
                assert not (await engine.score(event_at(scenario.events, i))).duplicate
        finally:
            await store.close()

    try:
        asyncio.run(main())
    finally:
        with redis_server.client() as c:
            c.execute_command("ACL", "DELUSER", "noscripts")
            c.flushall()


finite = st.floats(
    min_value=-1e300, max_value=1e300, allow_nan=False, allow_infinity=False, allow_subnormal=True
)


@settings(max_examples=60)
@given(values=st.lists(finite, min_size=1, max_size=8))
def test_script_adds_like_python_floats(redis_server: Any, values: list[float]) -> None:
    """Each step's sum, read back, has the bits of Python's left-to-right sum."""
    calls = ScriptCalls(ttl_s=60, read=True)
    with redis_server.client() as c:
        c.delete("es{conformance}")
        c.script_load(PROFILE_UPDATE)
        total = 0.0
        for v in values:
            args = calls.args(ProfileWrites({"m.0": v}, {}, {}, ()))
            c.evalsha(PROFILE_UPDATE_SHA, 1, "es{conformance}", *args)
            total = total + v
            got = c.zscore("es{conformance}", "m.0")
            assert got is not None
            # + 0.0 folds -0.0 into 0.0 (see test_redis_conformance): no store adds a signed zero
            assert _bits(got + 0.0) == _bits(total + 0.0), (values, v)
        c.delete("es{conformance}")


def test_replies_are_parsed_by_hiredis() -> None:
    """redis-py reads replies with hiredis when it is installed (redis-py README, "Parsers");
    the service depends on ``redis[hiredis]`` for that."""
    assert HIREDIS_AVAILABLE
    assert "Hiredis" in DefaultParser.__name__
