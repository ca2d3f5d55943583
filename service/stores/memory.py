"""The embedded store: everything in this process, same semantics as Redis.

It is the default when no Redis URL is configured, so the demo and a trial `serve` need nothing
else, and it is what the backfill replays through. Time is event time: records expire when the
stream has moved past their lifetime, so a replay of last quarter behaves as the live service did.
Nothing survives the process (a trial store, not a database).
"""

from __future__ import annotations

import heapq
from collections.abc import Sequence

from scoring.config import ScoringConfig
from scoring.event import EventPlan
from scoring.profile import Profile, TimeBasis
from service.stores.base import CLAIM_TTL_S, PENDING, Begun, Matured

SWEEP_EVERY = 1 << 16


class MemoryStore:
    """In-process `StateStore`.

    Parameters
    ----------
    config
        Scoring configuration (profile layout, identifier lifetime).
    idempotency_ttl_s
        How long an answer is kept for retries of the same event id.
    record_ttl_s
        How long learning records are kept (the label horizon).
    """

    def __init__(
        self, config: ScoringConfig, idempotency_ttl_s: float, record_ttl_s: float
    ) -> None:
        self.config = config
        self.idempotency_ttl_s = idempotency_ttl_s
        self.record_ttl_s = record_ttl_s
        self.profiles: dict[tuple[str, bytes], Profile] = {}
        self.answers: dict[bytes, tuple[bytes, float]] = {}
        self.records: dict[bytes, tuple[bytes, float]] = {}
        self.labels: dict[bytes, bool] = {}
        self.snapshot: bytes | None = None
        self._due: list[tuple[float, int, bytes]] = []
        self._sequence = 0
        self._now_s = float("-inf")
        self.observed_since_s: float | None = None

    async def begin(self, plan: EventPlan, *, read: bool) -> Begun:
        t = plan.basis.t_s
        self._tick(t)
        if self.observed_since_s is None:
            self.observed_since_s = t
        held = self.answers.get(plan.event_digest)
        if held is not None and held[1] > t:
            return Begun(duplicate=held[0])
        self.answers[plan.event_digest] = (PENDING, t + CLAIM_TTL_S)
        ttl = self.config.ttl_s
        profiles: list[Profile | None] = []
        for key in plan.identifiers:
            p = self.profiles.get(key)
            if p is not None and p.last_s is not None and t - p.last_s > ttl:
                del self.profiles[key]  # expired (as a Redis key would), when read or not
                p = None
            profiles.append(p)
        if not read:
            return Begun()
        return Begun(profiles=profiles, observed_since_s=self.observed_since_s)

    async def commit(
        self, plan: EventPlan, answer: bytes | None, record: bytes, mature_at_s: float | None
    ) -> None:
        t = plan.basis.t_s
        for key, hits, amount in zip(plan.identifiers, plan.hits, plan.amounts, strict=True):
            p = self.profiles.get(key)
            if p is None:
                p = self.profiles[key] = Profile(self.config)
            p.record(plan.basis, hits, amount)
        if answer is not None:
            self.answers[plan.event_digest] = (answer, t + self.idempotency_ttl_s)
        self.records[plan.event_digest] = (record, t + self.record_ttl_s)
        if mature_at_s is not None:
            self._sequence += 1
            heapq.heappush(self._due, (mature_at_s, self._sequence, plan.event_digest))

    async def load_record(self, event_digest: bytes) -> bytes | None:
        held = self.records.get(event_digest)
        if held is None or held[1] <= self._now_s:  # outlived the label horizon
            return None
        return held[0]

    async def get_label(self, event_digest: bytes) -> bool | None:
        return self.labels.get(event_digest)

    async def set_label(self, event_digest: bytes, is_fraud: bool) -> bool | None:
        previous = self.labels.get(event_digest)
        self.labels[event_digest] = is_fraud
        return previous

    async def add_label(
        self,
        identifiers: Sequence[tuple[str, bytes]],
        basis: TimeBasis,
        is_fraud: bool,
        weight: float,
    ) -> None:
        for key in identifiers:
            p = self.profiles.get(key)
            if p is not None:
                p.add_label(basis, is_fraud, weight)

    async def due(self, until_s: float) -> list[Matured]:
        out = []
        while self._due and self._due[0][0] <= until_s:
            _, _, digest = heapq.heappop(self._due)
            held = self.records.get(digest)
            if held is not None and held[1] > self._now_s:
                out.append(Matured(digest, held[0]))
        return out

    async def profile(self, kind: str, digest: bytes) -> Profile | None:
        return self.profiles.get((kind, digest))

    async def erase(self, kind: str, digest: bytes) -> bool:
        return self.profiles.pop((kind, digest), None) is not None

    async def load_snapshot(self) -> bytes | None:
        return self.snapshot

    async def save_snapshot(self, data: bytes, version: int) -> None:
        self.snapshot = data

    async def ping(self) -> bool:
        return True

    async def close(self) -> None:
        return None

    def _tick(self, t_s: float) -> None:
        """Advance the store's clock; now and then drop what has outlived its lifetime."""
        if t_s > self._now_s:
            self._now_s = t_s
        self._sequence += 1
        if self._sequence % SWEEP_EVERY:
            return
        now = self._now_s
        for digest in [k for k, (_, expires) in self.answers.items() if expires <= now]:
            del self.answers[digest]
        for digest in [k for k, (_, expires) in self.records.items() if expires <= now]:
            del self.records[digest]
            self.labels.pop(digest, None)
        ttl = self.config.ttl_s
        for key in [k for k, p in self.profiles.items() if p.last_s and now - p.last_s > ttl]:
            del self.profiles[key]
