"""The store protocol: the single seam between the pure scoring core and where state lives.

Every method takes and returns plain values (plans, profiles, bytes). The engine calls `begin`
before it scores an event and `commit` after; a store may apply the event's writes in either call,
as long as `begin` returns the state as it was *before* the event:

- the embedded store (`memory`) reads in `begin` and writes in `commit`;
- the Redis store reads and writes in one pipelined round trip in `begin` (the writes are
  additions, maxima and minima that need no read) and writes the answer and the learning record
  in `commit`, off the request path.

Identifiers appear only as (kind, keyed digest) pairs; events only as keyed digests of their ids.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol

from scoring.event import EventPlan
from scoring.profile import Profile, TimeBasis

PENDING = b""
"""Stored in place of an answer while the first request for an event id is being scored."""
RECORDED = b"recorded"
"""Stored in place of an answer for an event recorded without scoring (`POST /v1/events`)."""
CLAIM_TTL_S = 30.0
"""How long a claim lives without its answer: a request that died mid-way frees its event id
after this, instead of after the whole idempotency window."""


class StoreUnavailable(RuntimeError):
    """The store could not be reached or did not answer within the budget."""


@dataclass
class Begun:
    """What `begin` found: a previous answer for this event id, or the state before the event."""

    duplicate: bytes | None = None
    profiles: list[Profile | None] = field(default_factory=list)
    observed_since_s: float | None = None


@dataclass(frozen=True)
class Matured:
    """A sampled event whose maturity period has passed, with its learning record."""

    event_digest: bytes
    record: bytes


class StateStore(Protocol):
    """Where identifier state, event records, labels and the model snapshot live."""

    async def begin(self, plan: EventPlan, *, read: bool) -> Begun:
        """Claim the event id; if new, return profiles before the event (when ``read``)."""
        ...

    async def commit(
        self, plan: EventPlan, answer: bytes | None, record: bytes, mature_at_s: float | None
    ) -> None:
        """Save the answer (for retries) and the learning record; queue it for maturity."""
        ...

    async def load_record(self, event_digest: bytes) -> bytes | None: ...

    async def get_label(self, event_digest: bytes) -> bool | None: ...

    async def set_label(self, event_digest: bytes, is_fraud: bool) -> bool | None:
        """Remember an event's label; return the label it had before (None: none)."""
        ...

    async def add_label(
        self,
        identifiers: Sequence[tuple[str, bytes]],
        basis: TimeBasis,
        is_fraud: bool,
        weight: float,
    ) -> None:
        """Add (or, with ``weight=-1``, remove) a label on each identifier's statistics."""
        ...

    async def due(self, until_s: float) -> list[Matured]:
        """Queued events whose maturity time is at or before ``until_s``, oldest first."""
        ...

    async def profile(self, kind: str, digest: bytes) -> Profile | None: ...

    async def erase(self, kind: str, digest: bytes) -> bool: ...

    async def load_snapshot(self) -> bytes | None: ...

    async def save_snapshot(self, data: bytes, version: int) -> None: ...

    async def ping(self) -> bool: ...

    async def close(self) -> None: ...
