"""A lean pipelined connection to one Redis server, for the store's busiest exchanges.

redis-py's pipeline is general: per command it keeps an entry, encodes each argument and runs a
reply callback; per exchange it takes a connection from the pool (a lock, a readiness check) and
gives it back. The request path sends the same few command shapes a thousand times a second, so
it packs them itself (`pack`) and sends them on one connection that every exchange of the process
shares (`Wire`): an exchange writes all its commands at once and is handed as many replies; one
reader task takes the replies in order and gives each exchange its own (Redis answers a
connection's commands in the order it received them). No exchange holds the connection, so one
that gives up (its budget ran out) leaves it in step: its replies are read and dropped when they
come.

The reader takes whatever bytes have arrived and hands over every complete reply in them
(`_HiredisReplies`), where redis-py reads one reply per call, each through several awaits: an
event's round trip has six to eight replies. It reads this way when redis-py reads the
connection with hiredis (the default when hiredis is installed, as this project requires), with a
hiredis reader set up as redis-py sets up its own, so the replies are the values redis-py would
give; with any other parser it reads through redis-py, one reply at a time.

The connection itself is made by redis-py from the store's client (host or unix socket, TLS,
user, password, database, protocol), so every form of ``EMBERSCORE_REDIS_URL`` works. Errors
follow redis-py: an error reply is a `ResponseError` value in the replies; a lost connection
fails every exchange waiting on it with `ConnectionError`, and the next exchange connects again.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections import deque
from collections.abc import Callable, Iterable, Sequence
from typing import Any, cast

from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import InvalidResponse, ResponseError

Arg = bytes | str | int | float
Command = Sequence[Arg]

READ_SIZE = 65_536
"""Bytes the reader asks the connection for at a time."""

MAX_WAITING = 50_000
"""Exchanges that may wait for replies at once; past that the server is taken as hung: the
connection is dropped (failing them all) rather than let the queue grow."""


def pack(commands: Iterable[Command | bytes]) -> bytes:
    """Commands as the Redis serialization protocol has clients send them: each an array of
    bulk strings (RESP, "Sending commands to a Redis server"). Numbers are written as redis-py
    writes them (``repr`` of a float: the shortest text that reads back to the same double).
    A command given as `bytes` is taken as packed already.

    >>> pack([("SET", "k", b"v", "PX", 5)])
    b'*5\\r\\n$3\\r\\nSET\\r\\n$1\\r\\nk\\r\\n$1\\r\\nv\\r\\n$2\\r\\nPX\\r\\n$1\\r\\n5\\r\\n'
    >>> pack([("ZINCRBY", "z", 0.1, "m")]).split(b"\\r\\n")[6]
    b'0.1'
    """
    out: list[bytes] = []
    for command in commands:
        if type(command) is bytes:
            out.append(command)
            continue
        out.append(b"*%d\r\n" % len(command))
        for arg in command:
            data = _encoded(arg)
            out += (b"$%d\r\n" % len(data), data, b"\r\n")
    return b"".join(out)


def _encoded(arg: Arg) -> bytes:
    kind = type(arg)  # exact types: a bool is refused, as redis-py refuses it
    if kind is bytes:
        return cast(bytes, arg)
    if kind is str:
        return cast(str, arg).encode()
    if kind is int:
        return b"%d" % cast(int, arg)
    if kind is float:
        return repr(arg).encode()
    raise TypeError(f"cannot send a {kind.__name__} to Redis")


class _Waiting:
    """One exchange waiting for ``count`` replies."""

    __slots__ = ("count", "future", "replies")

    def __init__(self, count: int, future: asyncio.Future[list[Any]]) -> None:
        self.count = count
        self.future = future
        self.replies: list[Any] = []


class Wire:
    """One shared connection; `exchange` sends commands and returns their replies, in order.

    Parameters
    ----------
    client
        The redis-py client whose connection settings to use (its pool makes the connection;
        the connection gets no read timeout of its own: callers bound each exchange).
    """

    def __init__(self, client: Any, max_waiting: int = MAX_WAITING) -> None:
        pool = client.connection_pool
        self._connection_class = pool.connection_class
        self._connection_kwargs = {**pool.connection_kwargs, "socket_timeout": None}
        self._max_waiting = max_waiting
        self._connection: Any = None
        self._reader: asyncio.Task[None] | None = None
        self._waiting: deque[_Waiting] = deque()
        self._opening: asyncio.Lock | None = None

    async def exchange(self, commands: Sequence[Command | bytes]) -> list[Any]:
        """Send ``commands`` in one write; their replies (a `ResponseError` for an error reply)."""
        connection = await self._open()
        if len(self._waiting) >= self._max_waiting:
            await self._drop(RedisConnectionError("Redis has not answered for too long"))
            raise RedisConnectionError(f"more than {self._max_waiting} exchanges unanswered")
        waiting = _Waiting(len(commands), asyncio.get_running_loop().create_future())
        self._waiting.append(waiting)
        # No await between the check in `_open` and here: the reader is alive, so a failed or
        # interrupted send (redis-py then disconnects) fails every waiting exchange with it.
        await connection.send_packed_command(pack(commands), check_health=False)
        return await waiting.future

    async def close(self) -> None:
        """Drop the connection; exchanges still waiting fail."""
        await self._drop(RedisConnectionError("the store is closing"))

    def _alive(self) -> bool:
        """Whether the connection is up and its reader still takes replies."""
        return self._connection is not None and self._reader is not None and not self._reader.done()

    async def _open(self) -> Any:
        if self._alive():
            return self._connection
        if self._opening is None:
            self._opening = asyncio.Lock()
        async with self._opening:
            if not self._alive():
                connection = self._connection_class(**self._connection_kwargs)
                await connection.connect()
                self._connection = connection
                self._reader = asyncio.get_running_loop().create_task(self._read(connection))
        return self._connection

    async def _read(self, connection: Any) -> None:
        try:
            replies = _HiredisReplies.of(connection)
            if replies is None:
                while True:
                    try:
                        reply = await connection.read_response()
                    except ResponseError as exc:
                        reply = exc
                    self._hand_over(reply)
            while True:
                await replies.hand_over_next(self._hand_over)
        except BaseException as exc:  # lost, out of step, or closing: nobody gets a reply now
            # Given up before the first await below: an exchange that came meanwhile would wait
            # on this connection for replies that cannot come (and take the next one's).
            if self._connection is connection:
                self._connection = None
            self._fail_all(exc)
            with contextlib.suppress(Exception):
                await connection.disconnect()
            if not isinstance(exc, Exception):
                raise

    def _hand_over(self, reply: Any) -> None:
        if not self._waiting:
            raise RedisConnectionError("Redis sent a reply nobody asked for")
        head = self._waiting[0]
        head.replies.append(reply)
        if len(head.replies) == head.count:
            self._waiting.popleft()
            if not head.future.done():  # else: its caller gave up; the reply is dropped
                head.future.set_result(head.replies)

    def _fail_all(self, exc: BaseException) -> None:
        error = exc if isinstance(exc, RedisConnectionError) else None
        while self._waiting:
            future = self._waiting.popleft().future
            if not future.done():
                lost = error or RedisConnectionError(f"connection lost: {type(exc).__name__}")
                future.set_exception(lost)

    async def _drop(self, reason: RedisConnectionError) -> None:
        self._fail_all(reason)
        reader, self._reader = self._reader, None
        if reader is not None and not reader.done():
            reader.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await reader
        self._fail_all(reason)
        if self._connection is not None:
            with contextlib.suppress(Exception):
                await self._connection.disconnect()
            self._connection = None


class _HiredisReplies:
    """Every complete reply in the bytes at hand, parsed by a hiredis reader of the wire's own.

    The reader is set up as redis-py sets up its own for the connection (the same error-reply
    classes, the same decoding), so a reply is the value redis-py's ``read_response`` returns,
    and an error reply is a `ResponseError` value, as `Wire` gives it. What redis-py raises
    instead of returning is raised here too: a `ConnectionError` reply (``LOADING`` is one) and
    a closed connection.
    """

    def __init__(
        self, stream: asyncio.StreamReader, reader: Any, more: object, push: type | None
    ) -> None:
        self._stream = stream
        self._reader = reader
        self._more = more  # what the reader gives while a reply is incomplete
        self._push = push  # hiredis's class of push messages, where it has one

    @classmethod
    def of(cls, connection: Any) -> _HiredisReplies | None:
        """Replies of a connection redis-py reads with hiredis; None for any other parser (or a
        redis-py whose connection does not look as expected)."""
        parser: Any = getattr(connection, "_parser", None)
        stream = getattr(connection, "_reader", None)
        if type(parser).__name__ != "_AsyncHiredisParser" or stream is None:
            return None
        import hiredis

        more = object()
        settings: dict[str, Any] = {
            "protocolError": InvalidResponse,
            "replyError": parser.parse_error,
            "notEnoughData": more,
        }
        encoder = getattr(connection, "encoder", None)
        if encoder is not None and encoder.decode_responses:
            settings["encoding"] = encoder.encoding
            settings["errors"] = encoder.encoding_errors
        try:
            reader = hiredis.Reader(**settings)
        except TypeError:  # a hiredis without ``notEnoughData``: read through redis-py
            return None
        return cls(stream, reader, more, getattr(hiredis, "PushNotification", None))

    async def hand_over_next(self, hand_over: Callable[[Any], None]) -> None:
        """Wait for bytes; hand over each reply they complete (possibly none), in order."""
        data = await self._stream.read(READ_SIZE)
        if not data:
            raise RedisConnectionError("Connection closed by server.")
        self._reader.feed(data)
        reply = self._reader.gets()
        while reply is not self._more:
            if isinstance(reply, RedisConnectionError):
                raise reply
            if isinstance(reply, list) and reply and isinstance(reply[0], RedisConnectionError):
                raise reply[0]
            if self._push is None or not isinstance(reply, self._push):  # pushes: nobody asked
                hand_over(reply)
            reply = self._reader.gets()
