"""Request and response bodies of the HTTP API (pydantic), and how a request becomes an `Event`.

Requests are strict: unknown fields are refused, and values must have their JSON type (a number
is not accepted for an identifier, nor text for an amount), so that a caller's mistake is named
instead of silently coerced. Times follow the files' rules exactly (`service.files_times`): ISO
8601 text with a zone (or ``Z``) or epoch seconds, within the years 1970 to 2100.
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime, timedelta
from typing import Annotated, Literal, cast

import pyarrow as pa
from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    StringConstraints,
    WithJsonSchema,
)

from scoring.event import Event
from service.engine import ScoreResult
from service.files_times import ISO_PATTERN, MAX_TIME_S, MIN_TIME_S, parse_times

MAX_EVENT_ID_CHARS = 256
MAX_IDENTIFIER_CHARS = 2048
"""Longest identifier field accepted; the normalisers flag absurd values, this only bounds work."""

_ISO = re.compile(ISO_PATTERN)
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_MICROSECOND = timedelta(microseconds=1)
_TIME_SCHEMA = {
    "anyOf": [{"type": "string", "format": "date-time"}, {"type": "number"}],
    "description": "ISO 8601 time with a zone (or Z), or epoch seconds",
    "examples": ["2026-09-01T10:00:00Z", 1788256800],
}


def _slow_seconds(value: str | float) -> float:
    """The files' parser, for anything the fast path below does not settle (and its message)."""
    seconds, bad = parse_times(pa.array([value]))
    if 0 in bad:
        raise ValueError(bad[0])
    return float(seconds[0])


def parse_time(value: object) -> float:
    """Epoch seconds of an API time, by the same rules as time columns in files.

    The common forms are parsed here without Arrow (a request is one value); any other text,
    and every refusal, goes through `service.files_times.parse_times`, so messages and edge cases
    are those of the files.

    >>> parse_time("2026-09-01T12:00:00+02:00"), parse_time(1788256800)
    (1788256800.0, 1788256800.0)
    """
    if isinstance(value, bool) or not isinstance(value, str | int | float):
        raise ValueError("must be ISO 8601 text with a zone or epoch seconds (a number)")
    if isinstance(value, int | float):
        number = float(value)
        if math.isfinite(number) and MIN_TIME_S <= number < MAX_TIME_S:
            return number
        return _slow_seconds(number if math.isfinite(number) else str(value))
    text = value.strip()
    if _ISO.match(text):
        try:
            parsed = datetime.fromisoformat(text.upper().replace(",", "."))
        except ValueError:
            return _slow_seconds(value)
        seconds = ((parsed - _EPOCH) // _MICROSECOND) / 1e6
        if MIN_TIME_S <= seconds < MAX_TIME_S:
            return seconds
    return _slow_seconds(value)


Time = Annotated[float, BeforeValidator(parse_time), WithJsonSchema(_TIME_SCHEMA)]
EventId = Annotated[str, StringConstraints(min_length=1, max_length=MAX_EVENT_ID_CHARS)]
Identifier = Annotated[str, StringConstraints(max_length=MAX_IDENTIFIER_CHARS)] | None
Decision = Literal["allow", "review", "deny"]


def _fraud_flag(value: object) -> object:
    """``true``/``false`` or ``1``/``0`` (the labels file's form); anything else is refused."""
    if isinstance(value, bool):
        return value
    if isinstance(value, int) and value in (0, 1):
        return bool(value)
    raise ValueError("must be true or false (or 1 or 0)")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class EventIn(_Strict):
    """One sign-up, login or checkout; identifier fields may be absent, null or empty."""

    event_id: EventId
    ts: Time
    type: Literal["signup", "login", "checkout"]
    account_id: Identifier = None
    ip: Identifier = None
    device_id: Identifier = None
    phone: Identifier = None
    email: Identifier = None
    amount: Annotated[float, Field(ge=0.0, allow_inf_nan=False)] | None = None
    current_decision: Decision | None = None

    def to_event(self) -> Event:
        return Event(
            self.event_id,
            self.ts,
            self.type,
            account_id=self.account_id,
            ip=self.ip,
            device_id=self.device_id,
            phone=self.phone,
            email=self.email,
            amount=self.amount,
            current_decision=self.current_decision,
        )


class EventBatch(_Strict):
    """Events to record without scoring (at most ``max_batch`` of them)."""

    events: list[EventIn] = Field(min_length=1)


class LabelIn(_Strict):
    """What became known about one event, and when."""

    event_id: EventId
    labeled_at: Time
    is_fraud: Annotated[bool, BeforeValidator(_fraud_flag)]


class LabelBatch(_Strict):
    """Labels to apply (at most ``max_batch`` of them)."""

    labels: list[LabelIn] = Field(min_length=1)


class ScoreOut(BaseModel):
    """The answer to one score request."""

    event_id: str
    risk: float = Field(description="calibrated probability of fraud, 0 to 1")
    decision: Decision
    reasons: list[str] = Field(description="the largest contributions, in plain words")
    reason_codes: list[str]
    model_version: int
    duplicate: bool = Field(description="true when this is a retry: the first answer again")
    state_available: bool = Field(
        description="false when the store could not be reached: a prior-only answer"
    )

    @classmethod
    def of(cls, result: ScoreResult) -> ScoreOut:
        return cls(
            event_id=result.event_id,
            risk=round(result.risk, 6),  # as in scores files; stored answers keep 6 decimals
            decision=cast(Decision, result.decision),
            reasons=list(result.reasons),
            reason_codes=list(result.reason_codes),
            model_version=result.model_version,
            duplicate=result.duplicate,
            state_available=result.state_available,
        )


class EventsOut(BaseModel):
    """Outcome counts of a recorded batch."""

    received: int
    recorded: int
    duplicate: int = Field(description="event ids seen before: nothing was changed")


class LabelsOut(BaseModel):
    """Outcome counts of a label batch (``queued`` when a learner process applies them)."""

    received: int
    applied: int = 0
    changed: int = 0
    duplicate: int = 0
    unknown_event: int = 0
    queued: int = 0


class Problem(BaseModel):
    """One thing wrong with a request: where, and why, in plain words."""

    field: str
    reason: str


class ValidationProblems(BaseModel):
    """Body of a 422 answer."""

    detail: list[Problem]


class Message(BaseModel):
    """Body of other error answers."""

    detail: str


class Readiness(BaseModel):
    """Whether this process can answer: the store and the model, each ``ok`` or why not."""

    ready: bool
    store: str
    model: str
    model_version: int
