"""The engine: one orchestration of the scoring core over a store, for every caller.

The HTTP service, the backfill worker and the demo all score through `Engine`; the maths is in
`scoring/`. Each call reads the state as it was before the event, scores, then records:

1. `Planner.plan` normalises and hashes the identifiers and works out the event's writes;
2. `store.begin` claims the event id and returns the profiles before the event;
3. `FeatureReader.read` and `Fusion.assess` give risk, decision and reasons;
4. `store.commit` saves the answer (for retries) and the learning record.
"""

from __future__ import annotations

from dataclasses import dataclass

from scoring.config import ScoringConfig
from scoring.event import Event, Planner, maturity_sampled
from scoring.features import FeatureReader
from scoring.fusion import Fusion
from scoring.hashing import KeyHasher
from scoring.logrecord import AnswerCodec, EventRecord, RecordCodec, RecordError, StoredAnswer
from scoring.reasons import describe
from service.stores.base import PENDING, RECORDED, StateStore
from service.workers.learner import LabelOutcome, Learner


class InFlight(RuntimeError):
    """Another request with the same event id is being scored right now."""


class AlreadyRecorded(RuntimeError):
    """The event id was recorded without scoring; it is not scored afterwards."""


@dataclass(frozen=True)
class ScoreResult:
    """The answer to one score request."""

    event_id: str
    risk: float
    decision: str
    reasons: tuple[str, ...]
    reason_codes: tuple[str, ...]
    model_version: int
    duplicate: bool = False
    state_available: bool = True


class Engine:
    """Scores, records and labels events over a `StateStore`.

    With ``learner`` given (embedded mode), labels are learned in this process and maturity is
    driven by event time; without it, labels are only queued by the caller for a learner process.
    """

    def __init__(
        self,
        store: StateStore,
        config: ScoringConfig,
        hasher: KeyHasher,
        fusion: Fusion,
        learner: Learner | None = None,
        default_region: str | None = None,
    ) -> None:
        self.store = store
        self.config = config
        self.hasher = hasher
        self.planner = Planner(config, hasher, default_region)
        self.reader = FeatureReader(config)
        self.codec = RecordCodec(config)
        self.answers = AnswerCodec(config)
        self.fusion = fusion
        self.learner = learner

    async def score(self, event: Event) -> ScoreResult:
        """Score an event on the state before it, then record it (idempotent on event_id)."""
        plan = self.planner.plan(event)
        if self.learner is not None:
            await self.learner.catch_up(event.ts_s)
        begun = await self.store.begin(plan, read=True)
        if begun.duplicate is not None:
            return self._stored(event.event_id, begun.duplicate)
        x = self.reader.read(
            plan.basis,
            plan.identifiers,
            begun.profiles,
            event.type,
            event.amount,
            plan.flags,
            begun.observed_since_s,
        )
        a = self.fusion.assess(x)
        answer = StoredAnswer(
            a.risk, a.decision, tuple(zip(a.codes, a.values, strict=True)), a.model_version
        )
        record = EventRecord(event.ts_s, plan.identifiers, tuple(x), a.risk, a.model_version)
        await self.store.commit(
            plan,
            self.answers.encode(answer),
            self.codec.encode(record),
            self._mature_at(event.event_id, event.ts_s),
        )
        return ScoreResult(event.event_id, a.risk, a.decision, a.reasons, a.codes, a.model_version)

    def score_without_state(self, event: Event) -> ScoreResult:
        """Prior-only answer for when the store cannot be reached: nothing is read or recorded.

        Only what the event itself shows counts (flags such as a disposable domain or an
        invalid phone number); the result says ``state_available=False`` so that callers know.
        """
        plan = self.planner.plan(event)
        x = self.reader.read(
            plan.basis,
            plan.identifiers,
            [None] * len(plan.identifiers),
            event.type,
            event.amount,
            plan.flags,
        )
        a = self.fusion.assess(x, prior_only=True)
        return ScoreResult(
            event.event_id,
            a.risk,
            a.decision,
            a.reasons,
            a.codes,
            a.model_version,
            state_available=False,
        )

    async def record(self, event: Event) -> bool:
        """Record an event without scoring it; False when the event id was already seen."""
        plan = self.planner.plan(event)
        if self.learner is not None:
            await self.learner.catch_up(event.ts_s)
        begun = await self.store.begin(plan, read=False)
        if begun.duplicate is not None:
            return False
        record = EventRecord(event.ts_s, plan.identifiers, None, 0.0, 0)
        await self.store.commit(plan, RECORDED, self.codec.encode(record), None)
        return True

    async def label(self, event_id: str, is_fraud: bool) -> LabelOutcome:
        """Apply a label now (embedded mode); its effect starts from this moment."""
        if self.learner is None:
            raise RuntimeError("this engine has no in-process learner: queue labels instead")
        return await self.learner.apply_label(self.hasher.hash_text("event", event_id), is_fraud)

    def _mature_at(self, event_id: str, ts_s: float) -> float | None:
        if maturity_sampled(event_id, self.config.negative_sample_rate):
            return ts_s + self.config.maturity_s
        return None

    def _stored(self, event_id: str, data: bytes) -> ScoreResult:
        if data == PENDING:
            raise InFlight(f"event {event_id!r} is being scored by another request; retry shortly")
        if data == RECORDED:
            raise AlreadyRecorded(
                f"event {event_id!r} was recorded without scoring (POST /v1/events); "
                "only new event ids are scored"
            )
        try:
            answer = self.answers.decode(data)
        except RecordError as exc:
            raise InFlight(
                f"event {event_id!r} was answered under another configuration; use a new id"
            ) from exc
        return ScoreResult(
            event_id,
            answer.risk,
            answer.decision,
            tuple(describe(code, value) for code, value in answer.reasons),
            tuple(code for code, _ in answer.reasons),
            answer.model_version,
            duplicate=True,
        )
