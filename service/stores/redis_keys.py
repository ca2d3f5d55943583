"""Key names and value layouts of the Redis store, and the writes an event makes (no I/O here).

Every key holds one thing and every command touches one key, so the store runs unchanged on a
single server and on Redis Cluster. The part of a key between braces is its hash tag (the only
part Redis Cluster hashes):

==============================  ==========  ================================================
key                             type        what
==============================  ==========  ================================================
``es{<letter><digest>}``        sorted set  one identifier's `Profile` members (TTL: config)
``i{<event digest>}``           string      the answer for an event id (TTL: idempotency)
``lb{<event digest>}``          string      an event's label, ``1`` or ``0`` (TTL: horizon)
``l{<shard>}``                  stream      learning records of the events of one log shard
``m{mature}``                   stream      sampled events waiting for their maturity time
``es{meta}:since``              string      event time this store was first written at
``es{model}:snapshot``          string      the published model snapshot (msgpack)
``es{model}:version``           string      its version number
``es{labels}``                  stream      labels queued for the learner (consumer group)
``es{shadow}``                  stream      the live shadow log
==============================  ==========  ================================================

Digests are written in base64url without padding: 11 characters for 8 bytes.
"""

from __future__ import annotations

import math
from base64 import urlsafe_b64encode
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import msgpack

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.decay import epoch_length_s
from scoring.event import EventPlan
from scoring.profile import Profile, TimeBasis

MATURE_KEY = "m{mature}"
SINCE_KEY = "es{meta}:since"
SNAPSHOT_KEY = "es{model}:snapshot"
VERSION_KEY = "es{model}:version"
LABEL_QUEUE_KEY = "es{labels}"
LABEL_GROUP = "learners"
SHADOW_KEY = "es{shadow}"


def b64(digest: bytes) -> str:
    """Base64url of a digest, without padding.

    >>> b64(bytes(range(8)))
    'AAECAwQFBgc'
    """
    return urlsafe_b64encode(digest).rstrip(b"=").decode("ascii")


def identifier_key(kind: str, digest: bytes) -> str:
    """Key of one identifier's sorted set.

    >>> identifier_key("device", bytes(range(8)))
    'es{dAAECAwQFBgc}'
    """
    return f"es{{{KIND_LETTERS[kind]}{b64(digest)}}}"


def answer_key(event_digest: bytes) -> str:
    """Key of the idempotency claim / stored answer of an event id."""
    return f"i{{{b64(event_digest)}}}"


def label_key(event_digest: bytes) -> str:
    """Key of an event's label."""
    return f"lb{{{b64(event_digest)}}}"


def shard_of(event_digest: bytes, shards: int) -> int:
    """Log shard of an event: its digest as a big-endian integer, modulo the shard count.

    >>> shard_of(bytes(range(8)), 1024)
    519
    """
    return int.from_bytes(event_digest, "big") % shards


def record_stream_key(shard: int) -> str:
    """Key of the learning-record stream of one log shard."""
    return f"l{{{shard}}}"


@dataclass(frozen=True)
class ProfileWrites:
    """The commands one event makes on one identifier's sorted set.

    ``increments`` are forward-decay sums (ZINCRBY), ``lowest`` the first-seen second (ZADD LT),
    ``highest`` last seen and fan-out buckets (ZADD GT), ``stale`` the sums of epochs two or more
    behind the ones written (ZREM: faded by ``2**-512``, dropped as `Profile` drops them).
    """

    increments: dict[str, float]
    lowest: dict[str, float]
    highest: dict[str, float]
    stale: tuple[str, ...]

    def negated(self) -> dict[str, float]:
        """Increments that undo this event's additive part (first/last seen need no undo)."""
        return {name: -value for name, value in self.increments.items()}


def queue_writes(pipe: Any, key: str, write: ProfileWrites, ttl_s: int) -> None:
    """Add one identifier's writes to a pipeline: sums, first seen, maxima, stale sums, TTL."""
    for name, value in write.increments.items():
        pipe.zincrby(key, value, name)
    if write.lowest:
        pipe.zadd(key, write.lowest, lt=True)
    if write.highest:
        pipe.zadd(key, write.highest, gt=True)
    if write.stale:
        pipe.zrem(key, *write.stale)
    pipe.expire(key, ttl_s)


def reply_count(write: ProfileWrites) -> int:
    """How many pipeline replies `queue_writes` adds for one identifier."""
    parts = (write.lowest, write.highest, write.stale)
    return len(write.increments) + sum(1 for part in parts if part) + 1


STALE_MEMO = 256
"""Sets of sums whose stale members `WritePlanner` remembers (a backfill spans many epochs)."""


def _stale_epochs(half_life_s: float, ttl_s: float) -> range:
    """How far behind the written epoch to look for sums to drop (``range`` of offsets).

    A record outlives at most ``ttl_s`` without a write, so the oldest sum it can hold is
    ``ceil(ttl_s / epoch length) + 1`` epochs behind; offsets 2 to that are dropped.
    """
    return range(2, math.ceil(ttl_s / epoch_length_s(half_life_s)) + 2)


def _split(
    members: dict[str, float],
) -> tuple[dict[str, float], dict[str, float], dict[str, float]]:
    increments: dict[str, float] = {}
    lowest: dict[str, float] = {}
    highest: dict[str, float] = {}
    for name, value in members.items():
        if "." in name:
            increments[name] = value
        elif name == "f":
            lowest[name] = value
        else:
            highest[name] = value
    return increments, lowest, highest


class WritePlanner:
    """Turns events and labels into `ProfileWrites` with `Profile`'s own member naming.

    Each write is what a fresh `Profile` holds after the same update, so the member names and
    the added numbers are exactly those the embedded store adds.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> two_label_half_lives = 2 * cfg.label_half_life_s
    >>> writes = WritePlanner(cfg).label(TimeBasis.at(two_label_half_lives, cfg), True, 1.0)
    >>> writes.increments, writes.stale
    ({'b.0': 4.0}, ('b.-2',))
    """

    def __init__(self, config: ScoringConfig) -> None:
        self.config = config
        ttl = config.ttl_s
        self._offsets = {
            **{f"{j}": _stale_epochs(h, ttl) for j, h in enumerate(config.half_lives_s)},
            "s": _stale_epochs(config.half_lives_s[-1], ttl),
            "b": _stale_epochs(config.label_half_life_s, ttl),
            "g": _stale_epochs(config.label_half_life_s, ttl),
        }
        self._bucket_names: dict[tuple[str, int], str] = {}  # fan-out member names, made once
        self._stale_of: dict[tuple[str, ...], tuple[str, ...]] = {}
        self._sum_names_of: dict[tuple[int, ...], tuple[tuple[str, ...], str]] = {}

    def event(self, plan: EventPlan) -> list[ProfileWrites]:
        """Writes of one event, one per identifier of the plan.

        The sums, first seen and last seen are the same for every identifier of an event: they
        are what one fresh `Profile` holds after the event, and are shared (the same objects)
        by every identifier's writes. Each identifier adds its fan-out buckets (a maximum at the
        event's second, as `Profile.record` keeps them) and, for the amount kind, its spend.
        """
        basis = plan.basis
        counts, spend = self._sum_names(basis)
        # A fresh profile's sums after one event are 0.0 + 1.0 * factor, the factors themselves
        # (and its spend amount * factor), so only the names need a `Profile`.
        increments = dict(zip(counts, basis.factors, strict=True))
        t = int(basis.t_s)
        lowest = {"f": float(t)}
        seen = {"l": float(t)}
        stale = self._stale(increments)
        names = self._bucket_names
        out = []
        for hits, amount in zip(plan.hits, plan.amounts, strict=True):
            highest = seen
            if hits and t > -1:  # `Profile.record` keeps a bucket only past -1 (its default)
                highest = dict(seen)
                for hit in hits:
                    name = names.get(hit)
                    if name is None:
                        name = names[hit] = f"{hit[0]}{hit[1]}"
                    highest[name] = float(t)
            if amount is None:
                out.append(ProfileWrites(increments, lowest, highest, stale))
                continue
            own = {**increments, spend: amount * basis.factors[-1]}
            out.append(ProfileWrites(own, lowest, highest, self._stale(own)))
        return out

    def _sum_names(self, basis: TimeBasis) -> tuple[tuple[str, ...], str]:
        """Names of the sums an event adds to at ``basis``'s epochs: the counters' in order,
        and the spend's; taken from a fresh `Profile` (epochs change every few weeks)."""
        known = self._sum_names_of.get(basis.epochs)
        if known is None:
            p = Profile(self.config)
            p.record(basis, (), 1.0)
            *counts, spend = _split(p.to_members())[0]
            if len(self._sum_names_of) >= STALE_MEMO:
                self._sum_names_of.clear()
            known = self._sum_names_of[basis.epochs] = (tuple(counts), spend)
        return known

    def label(self, basis: TimeBasis, is_fraud: bool, weight: float) -> ProfileWrites:
        """Writes of one label (``weight=-1`` removes an earlier one) on each identifier."""
        p = Profile(self.config)
        p.add_label(basis, is_fraud, weight)
        increments, _, _ = _split(p.to_members())
        return ProfileWrites(increments, {}, {}, self._stale(increments))

    def _stale(self, increments: dict[str, float]) -> tuple[str, ...]:
        names = tuple(increments)  # epochs change every few weeks: the answer is kept
        known = self._stale_of.get(names)
        if known is not None:
            return known
        stale = []
        for name in names:
            head, _, epoch = name.partition(".")
            stale += [f"{head}.{int(epoch) - k}" for k in self._offsets[head]]
        if len(self._stale_of) >= STALE_MEMO:
            self._stale_of.clear()
        self._stale_of[names] = tuple(stale)
        return self._stale_of[names]


def encode_maturity(mature_at_s: float, record: bytes) -> bytes:
    """Value of a maturity-queue entry: msgpack ``[mature_at_s, record]``.

    >>> decode_maturity(encode_maturity(1.5, b"rec"))
    (1.5, b'rec')
    """
    return bytes(msgpack.packb([mature_at_s, record], use_bin_type=True))


def decode_maturity(data: bytes) -> tuple[float, bytes]:
    """Parse `encode_maturity` output."""
    mature_at_s, record = msgpack.unpackb(data)
    return float(mature_at_s), bytes(record)


def stream_ids_after(entry_id: bytes | str) -> str:
    """The smallest stream id greater than ``entry_id`` (``ms-seq`` becomes ``ms-(seq+1)``).

    >>> stream_ids_after(b"1700000000000-4")
    '1700000000000-5'
    """
    text = entry_id.decode() if isinstance(entry_id, bytes) else entry_id
    ms, _, seq = text.partition("-")
    return f"{ms}-{int(seq) + 1}"


def label_fields(event_digest: bytes, is_fraud: bool, labeled_at_s: float) -> dict[Any, Any]:
    """Fields of a label-queue entry (the same names in every entry, so Redis stores them once)."""
    return {"d": event_digest, "f": b"1" if is_fraud else b"0", "t": repr(labeled_at_s).encode()}


def shadow_fields(
    event_id: str, ts_s: float, risk: float, decision: str, current_decision: str | None
) -> dict[Any, Any]:
    """Fields of a shadow-log entry (a missing current decision is kept as an empty string)."""
    return {
        "e": event_id.encode(),
        "t": repr(ts_s).encode(),
        "r": repr(risk).encode(),
        "d": decision.encode(),
        "c": (current_decision or "").encode(),
    }


def text_fields(fields: dict[bytes, bytes], names: Sequence[str]) -> list[str]:
    """Decoded values of ``names`` in a stream entry read back from Redis."""
    return [fields[name.encode()].decode() for name in names]
