"""An event, and the plan of what it reads and changes in the store.

`Planner.plan` normalises the identifiers, hashes them, and works out every change the event makes
to each identifier's profile. The plan is pure data: the embedded store applies it to its
`Profile` objects, the Redis store turns it into commands, and both give the same state.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.hashing import KeyHasher
from scoring.identifiers import normalise_event
from scoring.profile import TimeBasis


def maturity_sampled(event_id: str, rate: float) -> bool:
    """Whether an event is one of the sample learned as legitimate once it matures.

    A fixed function of the event id (CRC-32, ISO 3309, read as a fraction of 2**32), so the
    live engine and the batch replay draw the same sample without sharing any state.

    >>> maturity_sampled("ev-1", 1.0), maturity_sampled("ev-1", 0.0)
    (True, False)
    """
    return zlib.crc32(event_id.encode()) < rate * 4294967296.0


@dataclass(frozen=True, slots=True)
class Event:
    """One sign-up, login or checkout as it arrives (raw identifier values).

    >>> Event("ev-1", 1_790_000_000.0, "signup", account_id="acct-9").identifier_fields()
    {'ip': None, 'device_id': None, 'phone': None, 'email': None, 'account_id': 'acct-9'}
    """

    event_id: str
    ts_s: float
    type: str
    account_id: str | None = None
    ip: str | None = None
    device_id: str | None = None
    phone: str | None = None
    email: str | None = None
    amount: float | None = None
    current_decision: str | None = None

    def identifier_fields(self) -> dict[str, str | None]:
        return {
            "ip": self.ip,
            "device_id": self.device_id,
            "phone": self.phone,
            "email": self.email,
            "account_id": self.account_id,
        }


@dataclass(frozen=True, slots=True)
class EventPlan:
    """What one event reads and writes.

    ``identifiers`` are the tracked (kind, digest) pairs present in the event, ``hits[i]`` the
    fan-out buckets identifier ``i`` records (target kind letter, bucket), ``amounts[i]`` the amount
    it adds to its spend (only for the configured amount kind).
    """

    event: Event
    event_digest: bytes
    basis: TimeBasis
    identifiers: tuple[tuple[str, bytes], ...]
    hits: tuple[tuple[tuple[str, int], ...], ...]
    amounts: tuple[float | None, ...]
    flags: frozenset[str]


class Planner:
    """Turns raw events into plans under one configuration and hashing secret.

    Examples
    --------
    >>> planner = Planner(ScoringConfig(), KeyHasher(b"demo-secret"))
    >>> plan = planner.plan(Event("ev-1", 1_790_000_000.0, "signup", account_id="acct-9",
    ...                           device_id="f00d"))
    >>> [kind for kind, _ in plan.identifiers]
    ['account', 'device']
    >>> [len(h) for h in plan.hits]   # account -> device, device -> account
    [1, 1]
    """

    def __init__(
        self, config: ScoringConfig, hasher: KeyHasher, default_region: str | None = None
    ) -> None:
        self.config = config
        self.hasher = hasher
        self.default_region = default_region
        tracked = set(config.kinds)
        self._tracked = tracked
        self._targets = {k: config.targets_of(k) for k in config.kinds}

    def plan(self, event: Event) -> EventPlan:
        normalised = normalise_event(
            ip=event.ip,
            device_id=event.device_id,
            phone=event.phone,
            email=event.email,
            account_id=event.account_id,
            default_region=self.default_region,
        )
        digest = self.hasher.digest
        tracked = self._tracked
        m = self.config.fanout_buckets
        identifiers: list[tuple[str, bytes]] = []
        buckets: dict[str, tuple[str, int]] = {}
        for kind, value in normalised.keys:
            if kind in tracked:
                d = digest(kind, value)
                identifiers.append((kind, d))
                buckets[kind] = (KIND_LETTERS[kind], int.from_bytes(d[4:8], "big") % m)
        hits = tuple(
            tuple(buckets[t] for t in self._targets[kind] if t in buckets)
            for kind, _ in identifiers
        )
        amount = event.amount if event.amount is not None and event.amount > 0 else None
        amount_kind = self.config.amount_kind
        return EventPlan(
            event,
            self.hasher.hash_text("event", event.event_id),
            TimeBasis.at(event.ts_s, self.config),
            tuple(identifiers),
            hits,
            tuple(amount if kind == amount_kind else None for kind, _ in identifiers),
            normalised.flags,
        )
