"""The request path's one round trip: an event's claims, then each identifier's read and writes.

Two forms send the same changes and leave the same state, bit for bit:

- **scripted** (a single server): one EVALSHA of `redis_script.PROFILE_UPDATE` per identifier,
  so an event with six identifiers is about seven commands instead of about forty-seven, sent on
  the store's shared `redis_wire.Wire`;
- **plain** (Redis Cluster, whose client pipeline runs no scripts; or a server that refuses
  scripts): ZRANGE then the identifier's writes (`redis_keys.queue_writes`) in a redis-py
  pipeline, which the cluster client splits by node.

The script is loaded (SCRIPT LOAD) when the store connects. A server that lost it (a restart, a
SCRIPT FLUSH) answers NOSCRIPT without running anything: the script is loaded again and only the
identifiers that got NOSCRIPT are sent again, so the claims, sent once, stay the event's own.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from redis.exceptions import NoScriptError, ResponseError

from service.stores.redis_keys import ProfileWrites, queue_writes, reply_count
from service.stores.redis_script import (
    PROFILE_UPDATE,
    PROFILE_UPDATE_SHA,
    ScriptCalls,
    members_of,
)
from service.stores.redis_wire import Command, Wire

Members = dict[str, float]


@dataclass(frozen=True)
class Claim:
    """``SET key value NX GET [PX ms]``: takes a key if free; the reply is what it held before
    (None: it was free, and now holds ``value``)."""

    key: str
    value: bytes
    px_ms: int | None = None

    def command(self) -> tuple[str | bytes | int, ...]:
        """The command as sent on the wire.

        >>> Claim("i{x}", b"", 30_000).command()
        ('SET', 'i{x}', b'', 'NX', 'GET', 'PX', 30000)
        """
        head = ("SET", self.key, self.value, "NX", "GET")
        return head if self.px_ms is None else (*head, "PX", self.px_ms)

    def queue(self, pipe: Any) -> None:
        """The same command on a redis-py pipeline."""
        pipe.set(self.key, self.value, nx=True, get=True, px=self.px_ms)


@dataclass(frozen=True)
class Exchanged:
    """Replies of one round trip: each claim's, and each identifier's sorted set before the
    event as member -> score (empty when not read, or when it did not exist)."""

    claims: list[Any]
    before: list[Members]
    commands: int


class EventExchange:
    """Builds and runs the round trip of an event, scripted (on ``wire``) or plain.

    Parameters
    ----------
    ttl_s
        Lifetime given to every identifier's sorted set.
    wire
        The shared connection for the scripted form; None sends plain commands.
    """

    def __init__(self, ttl_s: int, wire: Wire | None) -> None:
        self.ttl_s = ttl_s
        self.wire = wire

    @property
    def scripted(self) -> bool:
        return self.wire is not None

    async def load(self, client: Any) -> None:
        """Load the script (scripted form); a server that refuses it turns the form to plain."""
        if self.wire is None:
            return
        try:
            sha = await client.script_load(PROFILE_UPDATE)
        except ResponseError:  # scripting not allowed here (ACL, managed service): plain commands
            self.wire = None
            return
        if sha != PROFILE_UPDATE_SHA:
            raise RuntimeError(f"SCRIPT LOAD named the script {sha!r}, not {PROFILE_UPDATE_SHA!r}")

    async def run(
        self,
        client: Any,
        claims: Sequence[Claim],
        keys: Sequence[str],
        writes: Sequence[ProfileWrites],
        read: bool,
        ttl_s: int | None = None,
    ) -> Exchanged:
        """One round trip: the claims, then each identifier's read (when ``read``) and writes,
        giving each key ``ttl_s`` (default: the store's) to live. ``client`` is the redis-py
        client of the plain form and loads the script again after a NOSCRIPT."""
        ttl = self.ttl_s if ttl_s is None else ttl_s
        if self.wire is None:
            return await self._plain(client, claims, keys, writes, read, ttl)
        calls = ScriptCalls(ttl, read)
        commands: list[Command | bytes] = [claim.command() for claim in claims]
        commands += [calls.packed(key, write) for key, write in zip(keys, writes, strict=True)]
        replies = await self.wire.exchange(commands)
        await self._send_again(client, self.wire, commands, replies)
        raise_first(replies)
        first = len(claims)
        before = [members_of(reply) for reply in replies[first:]]
        return Exchanged(replies[:first], before, len(replies))

    async def _plain(
        self,
        client: Any,
        claims: Sequence[Claim],
        keys: Sequence[str],
        writes: Sequence[ProfileWrites],
        read: bool,
        ttl_s: int,
    ) -> Exchanged:
        pipe = client.pipeline(transaction=False)
        for claim in claims:
            claim.queue(pipe)
        reads: list[int] = []
        at = len(claims)
        for key, write in zip(keys, writes, strict=True):
            if read:
                reads.append(at)
                pipe.zrange(key, 0, -1, withscores=True)
            queue_writes(pipe, key, write, ttl_s)
            at += int(read) + reply_count(write)
        replies = await pipe.execute(raise_on_error=False)
        raise_first(replies)
        before = [{m.decode(): s for m, s in replies[i]} for i in reads] or [{} for _ in keys]
        return Exchanged(replies[: len(claims)], before, len(replies))

    async def _send_again(
        self, client: Any, wire: Wire, commands: list[Command | bytes], replies: list[Any]
    ) -> None:
        """Load the script and send again the scripts that found it missing (NOSCRIPT)."""
        missing = [i for i, reply in enumerate(replies) if isinstance(reply, NoScriptError)]
        if not missing:
            return
        await client.script_load(PROFILE_UPDATE)
        again = await wire.exchange([commands[i] for i in missing])
        for i, reply in zip(missing, again, strict=True):
            replies[i] = reply


def raise_first(replies: list[Any]) -> None:
    """Raise the first error reply (the form a redis-py pipeline raises it in)."""
    for reply in replies:
        if isinstance(reply, Exception):
            raise reply
