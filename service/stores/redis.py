"""The Redis store: production state, one pipelined round trip per scored event.

Layout (see `service.stores.redis_keys` for every key): one sorted set per identifier holding
its `Profile` members. An event's changes are additions to forward-decay sums (ZINCRBY), a
minimum (first seen, ZADD LT) and maxima (last seen and fan-out buckets, ZADD GT): they commute
and need no read, so `begin` sends, in one round trip, the idempotency claim and for each
identifier its read followed by its writes. Reads precede their key's writes, so they see the
state before the event. Every command touches one key, so the layout is valid on Redis Cluster.
On a single server each identifier's read and writes run as one server-side script on that one
key, sent with the claim on a connection the process's requests share
(`service.stores.redis_event`, `service.stores.redis_wire`); on a cluster they are plain
commands in a redis-py pipeline (the client splits it by node, and runs no scripts). Both forms
leave the same state, bit for bit.

Redis adds scores in IEEE double precision, as Python does, so replaying a stream in order gives
the same numbers as the embedded store. Two differences remain, both documented:
lifetimes are wall-clock TTLs here (event time in the embedded store), and a retried event's
undo subtracts what it added (exact up to float rounding).

`commit` and the shadow log are written behind the request by one background task
(`service.stores.redis_writer`); reads that need them (`load_record`, `due`, `read_shadow`)
flush that queue first, so one process always reads its own writes.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable, Sequence
from typing import Any

from scoring.config import ScoringConfig
from scoring.event import EventPlan
from scoring.profile import Profile, TimeBasis
from service.config import Settings
from service.stores import redis_streams as streams
from service.stores.base import CLAIM_TTL_S, PENDING, Begun, Matured, StoreUnavailable
from service.stores.redis_client import Client, check_server, guard, make_client
from service.stores.redis_event import Claim, EventExchange, raise_first
from service.stores.redis_keys import (
    LABEL_GROUP,
    LABEL_QUEUE_KEY,
    MATURE_KEY,
    SHADOW_KEY,
    SINCE_KEY,
    SNAPSHOT_KEY,
    VERSION_KEY,
    ProfileWrites,
    WritePlanner,
    answer_key,
    encode_maturity,
    identifier_key,
    label_fields,
    label_key,
    record_stream_key,
    shadow_fields,
    shard_of,
)
from service.stores.redis_wire import Command, Wire
from service.stores.redis_writer import Write, WriteBehind
from service.tables import ScoreTable

BACKGROUND_TIMEOUT_S = 10.0
"""Time limit of exchanges off the request path (write-behind, learner, warm, reports)."""
MAX_BLOCK_MS = 5000
"""Longest wait of one `read_labels` call (it returns empty after that; call it again)."""
WRITE_QUEUE = 100_000
WRITE_BATCH = 500
WRITE_LINGER_S = 0.005
"""How long the write-behind waits for more writes before sending a batch: at a few hundred
events a second per process, one exchange carries several events' writes instead of one."""


def remaining_ttl_s(ttl_s: float, last_s: int | None, now_s: float) -> int:
    """Whole seconds of lifetime a record has left at ``now_s`` (at least 1), as the live
    store's TTL would stand then.

    >>> remaining_ttl_s(7_776_000.0, 1_000, 1_000 + 86_400.0)
    7689600
    """
    used = 0.0 if last_s is None else now_s - last_s
    return max(1, math.ceil(ttl_s - used))


class RedisStore:
    """`StateStore` on Redis (a single server or a cluster); build it with `connect`.

    Parameters
    ----------
    fast
        Client for the request path; its sockets give up after the scoring budget.
    background
        Client for everything off the request path.
    settings, config
        Service settings (TTLs, shards, budget) and the scoring configuration.
    """

    def __init__(
        self, fast: Client, background: Client, settings: Settings, config: ScoringConfig
    ) -> None:
        self.fast = fast
        self.background = background
        self.config = config
        self.settings = settings
        self.budget_s = settings.score_budget_ms / 1000.0
        self.slow_s = max(BACKGROUND_TIMEOUT_S, self.budget_s)
        self.planner = WritePlanner(config)
        self._ttl_s = math.ceil(config.ttl_s)
        self._answer_ttl_ms = math.ceil(settings.idempotency_ttl_s * 1000)
        self._claim_ttl_ms = math.ceil(min(CLAIM_TTL_S, settings.idempotency_ttl_s) * 1000)
        self._horizon_s = math.ceil(settings.label_horizon_s)
        self._since_s: float | None = None
        self._next_due_s: float | None = None
        self._group_ready = False
        self.writer = WriteBehind(self._run_writes, WRITE_QUEUE, WRITE_BATCH, WRITE_LINGER_S)
        single = not settings.redis_cluster  # a cluster client has no single connection to share
        self.wire = Wire(fast) if single else None
        self.background_wire = Wire(background) if single else None
        self.exchange = EventExchange(self._ttl_s, self.wire)

    @classmethod
    async def connect(cls, settings: Settings, config: ScoringConfig) -> RedisStore:
        """Open clients for ``settings.redis_url`` and check the server (Redis >= 7.0)."""
        budget_s = settings.score_budget_ms / 1000.0
        fast = make_client(settings, budget_s)
        background = make_client(settings, max(BACKGROUND_TIMEOUT_S, budget_s))
        store = cls(fast, background, settings, config)
        try:
            await check_server(background, BACKGROUND_TIMEOUT_S)
            async with guard("loading the update script", BACKGROUND_TIMEOUT_S):
                await store.exchange.load(background)
        except StoreUnavailable:
            await fast.aclose()
            await background.aclose()
            raise
        return store

    # -- the request path -------------------------------------------------------------------

    async def begin(self, plan: EventPlan, *, read: bool) -> Begun:
        """Claim the event id and apply its writes; return the profiles from before them."""
        keys = [identifier_key(kind, digest) for kind, digest in plan.identifiers]
        writes = self.planner.event(plan)
        ask_since = self._since_s is None
        claims = [Claim(answer_key(plan.event_digest), PENDING, self._claim_ttl_ms)]
        if ask_since:
            claims.append(Claim(SINCE_KEY, repr(plan.basis.t_s).encode()))
        async with guard("the event read and write", self.budget_s):
            done = await self.exchange.run(self.fast, claims, keys, writes, read)
        claim = done.claims[0]
        if ask_since:
            since = done.claims[1]
            self._since_s = plan.basis.t_s if since is None else float(since)
        if claim is not None:
            await self._undo(keys, writes)
            return Begun(duplicate=bytes(claim))
        if not read:
            return Begun()
        profiles = [self._profile_of(members) for members in done.before]
        return Begun(profiles=profiles, observed_since_s=self._since_s)

    def _profile_of(self, members: dict[str, float]) -> Profile | None:
        return Profile.from_members(members, self.config) if members else None

    async def _undo(self, keys: list[str], writes: list[ProfileWrites]) -> None:
        """Take back a duplicate's additions (its maxima and minima change nothing)."""
        async with guard("undoing a duplicate event", self.budget_s):
            pipe = self.fast.pipeline(transaction=False)
            for key, write in zip(keys, writes, strict=True):
                for name, value in write.negated().items():
                    pipe.zincrby(key, value, name)
            await pipe.execute()

    async def commit(
        self, plan: EventPlan, answer: bytes | None, record: bytes, mature_at_s: float | None
    ) -> None:
        """Queue the answer, the learning record and the maturity entry (off the request path)."""
        digest = plan.event_digest
        shard_key = record_stream_key(shard_of(digest, self.settings.log_shards))
        minid = self._horizon_minid()
        queued = None if mature_at_s is None else encode_maturity(mature_at_s, record)

        write: list[Command] = []
        if answer is not None:  # the claim's short life becomes the idempotency window
            write.append(("SET", answer_key(digest), answer, "XX", "PX", self._answer_ttl_ms))
        write.append(("XADD", shard_key, "MINID", "~", minid, "*", digest, record))
        if queued is not None:
            write.append(("XADD", MATURE_KEY, "MINID", "~", minid, "*", digest, queued))
        self.writer.submit(write)

    def _horizon_minid(self) -> str:
        """Stream id before which entries are older than the label horizon (wall clock)."""
        return str(max(0, int(time.time() * 1000) - self._horizon_s * 1000))

    async def _run_writes(self, writes: list[Write]) -> None:
        commands = [command for write in writes for command in write]
        async with guard("a background write", self.slow_s):
            if self.background_wire is not None:
                raise_first(await self.background_wire.exchange(commands))
                return
            pipe = self.background.pipeline(transaction=False)
            for command in commands:
                pipe.execute_command(*command)
            await pipe.execute()

    async def flush(self) -> None:
        """Wait until every write queued by this store object has reached Redis."""
        await self.writer.flush()

    @property
    def counters(self) -> dict[str, int]:
        """Write-behind counters (written, dropped, failed) and the queue depth, for metrics."""
        return {**self.writer.counters, "queued": self.writer.depth}

    # -- records, labels and maturity (the learner) -----------------------------------------

    async def load_record(self, event_digest: bytes) -> bytes | None:
        await self.flush()
        key = record_stream_key(shard_of(event_digest, self.settings.log_shards))
        return await streams.find_record(self.background, key, event_digest, self.slow_s)

    async def get_label(self, event_digest: bytes) -> bool | None:
        async with guard("a label read", self.slow_s):
            value = await self.background.get(label_key(event_digest))
        return None if value is None else value == b"1"

    async def set_label(self, event_digest: bytes, is_fraud: bool) -> bool | None:
        async with guard("a label write", self.slow_s):
            previous = await self.background.set(
                label_key(event_digest), b"1" if is_fraud else b"0", ex=self._horizon_s, get=True
            )
        return None if previous is None else previous == b"1"

    async def add_label(
        self,
        identifiers: Sequence[tuple[str, bytes]],
        basis: TimeBasis,
        is_fraud: bool,
        weight: float,
    ) -> None:
        """Add a label on each identifier that still has a record (an expired one stays gone)."""
        keys = [identifier_key(kind, digest) for kind, digest in identifiers]
        if not keys:
            return
        async with guard("a label update", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            for key in keys:
                pipe.exists(key)
            alive = await pipe.execute()
        live = [key for key, exists in zip(keys, alive, strict=True) if exists]
        if not live:
            return
        write = self.planner.label(basis, is_fraud, weight)
        async with guard("a label update", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            for key in live:
                for name, value in write.increments.items():
                    pipe.zincrby(key, value, name)
                if write.stale:
                    pipe.zrem(key, *write.stale)
                # A no-op on a live record; gives a lifetime to one that expired in between.
                pipe.expire(key, self._ttl_s, nx=True)
            await pipe.execute()

    async def due(self, until_s: float) -> list[Matured]:
        """Queued events whose maturity time (event time) is at or before ``until_s``.

        Entries come in queue (arrival) order and are removed from Redis as they are returned,
        so a restarted learner goes on where this one stopped. One learner consumes the queue:
        the maturity time of the first waiting entry is remembered, and calls before it need no
        round trip.
        """
        if self._next_due_s is not None and until_s < self._next_due_s:
            return []
        await self.flush()
        matured, last, self._next_due_s = await streams.read_due(
            self.background, until_s, self.slow_s
        )
        if last is not None:
            await streams.consume_due(self.background, last, self.slow_s)
        return matured

    async def enqueue_labels(self, labels: Sequence[tuple[bytes, bool, float]]) -> None:
        """Queue labels ``(event digest, is_fraud, labeled_at_s)`` for the learner process."""
        if not labels:
            return
        minid = self._horizon_minid()
        async with guard("queueing labels", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            for digest, is_fraud, labeled_at_s in labels:
                pipe.xadd(
                    LABEL_QUEUE_KEY, label_fields(digest, is_fraud, labeled_at_s), minid=minid
                )
            await pipe.execute()

    async def read_labels(
        self, consumer: str, count: int, block_ms: int
    ) -> list[tuple[str, bytes, bool, float]]:
        """Labels for ``consumer``: its unacknowledged ones first, else new ones.

        Returns ``(entry id, event digest, is_fraud, labeled_at_s)``; waits at most
        ``min(block_ms, MAX_BLOCK_MS)`` for new ones. Use one stable consumer name per learner:
        after a crash, the same name gets back what was read and not acknowledged.
        """
        if not self._group_ready:
            await streams.ensure_label_group(self.background, self.slow_s)
            self._group_ready = True
        block = max(1, min(block_ms, MAX_BLOCK_MS))
        return await streams.read_label_queue(self.background, consumer, count, block, self.slow_s)

    async def ack_labels(self, ids: Sequence[str]) -> None:
        """Acknowledge applied labels; they leave the queue."""
        if not ids:
            return
        checked = streams.ids_text(ids)
        async with guard("acknowledging labels", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            pipe.xack(LABEL_QUEUE_KEY, LABEL_GROUP, *checked)
            pipe.xdel(LABEL_QUEUE_KEY, *checked)
            await pipe.execute()

    # -- shadow log ---------------------------------------------------------------------------

    async def append_shadow(
        self,
        event_id: str,
        ts_s: float,
        risk: float,
        decision: str,
        current_decision: str | None,
    ) -> None:
        """Queue one line of the live shadow log (written behind; capped at shadow_log_max).

        ``current_decision`` is the decision of the rules in force (None: not given).
        """
        fields = shadow_fields(event_id, ts_s, risk, decision, current_decision)
        cap = self.settings.shadow_log_max
        items = [part for pair in fields.items() for part in pair]
        self.writer.submit([("XADD", SHADOW_KEY, "MAXLEN", "~", cap, "*", *items)])

    async def read_shadow(self) -> ScoreTable:
        """The live shadow log, oldest first (reasons are not kept)."""
        await self.flush()
        return await streams.read_shadow_log(self.background, self.slow_s)

    # -- identifiers, snapshots, life cycle -----------------------------------------------------

    async def profile(self, kind: str, digest: bytes) -> Profile | None:
        async with guard("a profile read", self.slow_s):
            pairs: Any = await self.background.zrange(
                identifier_key(kind, digest), 0, -1, withscores=True
            )
        return self._profile_of({m.decode(): s for m, s in pairs})

    async def erase(self, kind: str, digest: bytes) -> bool:
        async with guard("an erasure", self.slow_s):
            return bool(await self.background.delete(identifier_key(kind, digest)))

    async def warm(
        self, profiles: Iterable[tuple[str, bytes, Profile]], now_s: float, batch: int = 1000
    ) -> int:
        """Write whole profiles (replacing what a key held), ``batch`` per pipeline, each with
        the lifetime it has left at ``now_s`` (`remaining_ttl_s`); the count written."""
        written = 0
        chunk: list[tuple[str, bytes, Profile]] = []
        for item in profiles:
            chunk.append(item)
            if len(chunk) >= batch:
                written += await self._warm_batch(chunk, now_s)
                chunk = []
        if chunk:
            written += await self._warm_batch(chunk, now_s)
        return written

    async def _warm_batch(self, chunk: list[tuple[str, bytes, Profile]], now_s: float) -> int:
        written = 0
        async with guard("a warm-up write", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            for kind, digest, profile in chunk:
                members = profile.to_members()
                if not members:
                    continue
                key = identifier_key(kind, digest)
                pipe.delete(key)
                pipe.zadd(key, members)
                pipe.expire(key, remaining_ttl_s(self.config.ttl_s, profile.last_s, now_s))
                written += 1
            await pipe.execute()
        return written

    async def load_snapshot(self) -> bytes | None:
        async with guard("a snapshot read", self.slow_s):
            data: Any = await self.background.get(SNAPSHOT_KEY)
        return None if data is None else bytes(data)

    async def save_snapshot(self, data: bytes, version: int) -> None:
        """Publish a snapshot; the version is written after it, so a poller never runs ahead."""
        async with guard("a snapshot write", self.slow_s):
            pipe = self.background.pipeline(transaction=False)
            pipe.set(SNAPSHOT_KEY, data)
            pipe.set(VERSION_KEY, str(int(version)))
            await pipe.execute()

    async def snapshot_version(self) -> int | None:
        """Version of the published snapshot (cheap to poll), or None before the first."""
        async with guard("a snapshot version read", self.budget_s):
            value = await self.fast.get(VERSION_KEY)
        return None if value is None else int(value)

    async def ping(self) -> bool:
        try:
            async with guard("a ping", self.budget_s):
                return bool(await self.fast.ping())
        except StoreUnavailable:
            return False

    async def close(self) -> None:
        """Flush the write-behind queue, then close both clients."""
        try:
            await self.writer.close()
        finally:
            for wire in (self.wire, self.background_wire):
                if wire is not None:
                    await wire.close()
            await self.fast.aclose()
            await self.background.aclose()
