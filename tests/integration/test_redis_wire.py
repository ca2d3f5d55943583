"""`Wire` (one shared, pipelined connection) and `pack` against a real redis-server.

- `pack` writes the bytes redis-py's own packer writes (the reference client), for every kind
  of argument the store sends.
- Concurrent exchanges each get their own replies, in order; an error reply is a value and the
  connection goes on; an exchange whose caller gave up leaves the connection in step.
- A lost connection fails what waits on it, and the next exchange connects again.
- The wire reads replies itself (a hiredis reader of its own) when redis-py reads the
  connection with hiredis, and through redis-py otherwise: each behaviour above is checked with
  both, and the values are redis-py's (error classes, decoding, replies longer than one read).
"""

from __future__ import annotations

import asyncio
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from redis._parsers import _AsyncRESP2Parser
from redis.asyncio import Redis
from redis.asyncio.connection import Connection
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import NoScriptError, ResponseError

from service.stores.redis_wire import READ_SIZE, Wire, _HiredisReplies, pack

args = st.one_of(
    st.binary(max_size=40),
    st.text(max_size=20),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=False, allow_infinity=False),
)


names = st.sampled_from(["SET", "ZINCRBY", "EVALSHA", "XADD"])
commands_ = st.lists(st.tuples(names, st.lists(args, max_size=6)), min_size=1, max_size=4)


@given(named=commands_)
def test_pack_writes_what_redis_py_writes(named: list[tuple[str, list[Any]]]) -> None:
    """(redis-py reads a first argument holding spaces as several words: names never do.)"""
    commands = [(name, *rest) for name, rest in named]
    reference = Connection()
    expected = b"".join(b"".join(reference.pack_command(*c)) for c in commands)
    assert pack(commands) == expected


def test_pack_refuses_what_it_cannot_send() -> None:
    with pytest.raises(TypeError, match="bool"):
        pack([("SET", "k", True)])  # type: ignore[list-item]


PARSERS = {"hiredis": {}, "python": {"parser_class": _AsyncRESP2Parser}}
"""How redis-py reads the connection: hiredis (its default when installed) or in Python."""


@pytest.fixture(params=sorted(PARSERS))
def parser(request: pytest.FixtureRequest) -> str:
    return str(request.param)


def _run(url: str, body: Any, parser: str = "hiredis", **options: Any) -> Any:
    async def main() -> Any:
        client = Redis.from_url(url, **PARSERS[parser], **options)
        wire = Wire(client)
        try:
            return await body(wire)
        finally:
            await wire.close()
            await client.aclose()

    return asyncio.run(main())


def test_concurrent_exchanges_get_their_own_replies(redis_url: str, parser: str) -> None:
    async def body(wire: Wire) -> None:
        async def one(i: int) -> list[Any]:
            return await wire.exchange([("ECHO", f"a{i}"), ("ECHO", f"b{i}")])

        replies = await asyncio.gather(*(one(i) for i in range(300)))
        assert replies == [[f"a{i}".encode(), f"b{i}".encode()] for i in range(300)]

    _run(redis_url, body, parser)


def test_an_error_reply_is_a_value_and_the_connection_goes_on(redis_url: str, parser: str) -> None:
    async def body(wire: Wire) -> None:
        replies = await wire.exchange([("SET", "w{1}", "x"), ("INCR", "w{1}"), ("GET", "w{1}")])
        assert replies[0] in (b"OK", "OK", True)
        assert isinstance(replies[1], ResponseError)
        assert replies[2] == b"x"
        assert await wire.exchange([("ECHO", "after")]) == [b"after"]

    _run(redis_url, body, parser)


def test_a_caller_that_gives_up_leaves_the_connection_in_step(redis_url: str, parser: str) -> None:
    """The first exchange blocks in Redis (BLPOP with a 0.3 s timeout); its caller stops
    waiting at once; the next exchange still gets its own reply, not the late one."""

    async def body(wire: Wire) -> None:
        with pytest.raises(TimeoutError):
            await asyncio.wait_for(wire.exchange([("BLPOP", "w{empty}", "0.3")]), 0.01)
        assert await wire.exchange([("ECHO", "mine")]) == [b"mine"]

    _run(redis_url, body, parser)


def test_too_many_unanswered_exchanges_drop_the_connection(redis_url: str) -> None:
    async def body(wire: Wire) -> None:
        wire._max_waiting = 2
        blocked = [
            asyncio.ensure_future(wire.exchange([("BLPOP", "w{empty}", "1")])) for _ in range(2)
        ]
        await asyncio.sleep(0)  # both are sent and waiting
        with pytest.raises(RedisConnectionError, match="unanswered"):
            await wire.exchange([("ECHO", "third")])
        for task in blocked:
            with pytest.raises(RedisConnectionError):
                await task
        assert await wire.exchange([("ECHO", "fresh")]) == [b"fresh"]

    _run(redis_url, body)


def test_a_lost_connection_fails_waiters_and_the_next_exchange_reconnects(
    own_redis: Any, parser: str
) -> None:
    async def body(wire: Wire) -> None:
        assert await wire.exchange([("ECHO", "one")]) == [b"one"]
        waiting = asyncio.ensure_future(wire.exchange([("BLPOP", "w{empty}", "5")]))
        await asyncio.sleep(0.1)
        own_redis.stop()
        with pytest.raises(RedisConnectionError):
            await waiting
        with pytest.raises(RedisConnectionError):
            await wire.exchange([("ECHO", "down")])
        own_redis.start()
        assert await wire.exchange([("ECHO", "back")]) == [b"back"]

    _run(own_redis.url, body, parser)


def test_the_wire_reads_replies_itself_only_where_redis_py_uses_hiredis(
    redis_url: str, parser: str
) -> None:
    async def body(wire: Wire) -> None:
        assert await wire.exchange([("ECHO", "x")]) == [b"x"]
        own = _HiredisReplies.of(wire._connection)
        assert (own is not None) == (parser == "hiredis")

    _run(redis_url, body, parser)


def test_error_replies_are_redis_py_s_own_classes(redis_url: str, parser: str) -> None:
    """NOSCRIPT must stay a `NoScriptError`: the store sends the script again on it."""

    async def body(wire: Wire) -> None:
        replies = await wire.exchange([("EVALSHA", "0" * 40, 0), ("ECHO", "next")])
        assert isinstance(replies[0], NoScriptError)
        assert replies[1] == b"next"

    _run(redis_url, body, parser)


def test_replies_longer_than_one_read_arrive_whole_and_in_order(
    redis_url: str, parser: str
) -> None:
    big = bytes(range(256)) * (3 * READ_SIZE // 256 + 7)  # three reads and a bit

    async def body(wire: Wire) -> None:
        await wire.exchange([("SET", "w{big}", big)])
        echoes = [("ECHO", f"e{i}") for i in range(3_000)]  # many replies split across reads
        replies = await wire.exchange([("GET", "w{big}"), *echoes, ("GET", "w{big}")])
        assert replies[0] == big
        assert replies[-1] == big
        assert replies[1:-1] == [f"e{i}".encode() for i in range(3_000)]

    _run(redis_url, body, parser)


def test_decoded_replies_are_what_redis_py_decodes(redis_url: str, parser: str) -> None:
    async def body(wire: Wire) -> None:
        replies = await wire.exchange([("ECHO", "héllo"), ("GET", "w{nothing}")])
        assert replies == ["héllo", None]

    _run(redis_url, body, parser, decode_responses=True)
