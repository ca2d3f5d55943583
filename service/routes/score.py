"""``POST /v1/score``: score one event on the state before it, then record it.

The whole exchange with the store runs under ``score_budget_ms``. When the store fails or runs
out of time, the answer is, per ``on_store_failure``, either a prior-only score from what the
event itself shows (``state_available: false``; "fail open") or a 503 ("fail closed"): never a
hang. Retries of an event id get the first answer again (``duplicate: true``); a retry that
arrives while the first request is still being scored gets a 409.

A well-formed request with an accepted key reaches `score` through the fast lane
(`service.routes.lane`); anything else through FastAPI. Either way `score` serialises the answer
once, here, rather than have it validated again against ``response_model`` (which documents it).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging

from fastapi import APIRouter, HTTPException, Response
from pydantic import TypeAdapter
from starlette.background import BackgroundTask

from scoring.event import Event
from service.api_models import EventIn, Message, ScoreOut, ValidationProblems
from service.engine import AlreadyRecorded, InFlight, ScoreResult
from service.routes.deps import ApiKey, Runtime, RuntimeDep, store_unavailable
from service.routes.lane import JSON_TYPE
from service.stores.base import StoreUnavailable

router = APIRouter(prefix="/v1", tags=["scoring"], dependencies=[ApiKey])
_SCORE_OUT = TypeAdapter(ScoreOut)
log = logging.getLogger("emberscore.service")


async def _score(runtime: Runtime, event: Event) -> ScoreResult:
    try:
        async with asyncio.timeout(runtime.score_budget_s):
            return await runtime.engine.score(event)
    except (InFlight, AlreadyRecorded) as exc:
        raise HTTPException(409, str(exc)) from exc
    except (TimeoutError, StoreUnavailable) as exc:
        runtime.metrics.store_error("score", exc)
        cause = "timeout" if isinstance(exc, TimeoutError) else "unavailable"
        if runtime.settings.on_store_failure == "closed":
            log.warning("store %s while scoring: answered 503 (fail closed)", cause)
            raise store_unavailable("scoring") from exc
        log.warning("store %s while scoring: answered without state (fail open)", cause)
        runtime.metrics.fail_open.inc()
        return runtime.engine.score_without_state(event)


async def _append_shadow(runtime: Runtime, event: Event, result: ScoreResult) -> None:
    """Add the answer beside the rules' decision to the live shadow log (after responding)."""
    with contextlib.suppress(HTTPException):  # counted and logged by `bounded`: the answer is out
        await runtime.bounded(
            "shadow log",
            runtime.store.append_shadow(
                event.event_id, event.ts_s, result.risk, result.decision, event.current_decision
            ),
        )


@router.post(
    "/score",
    response_model=ScoreOut,
    summary="Score one event, then record it",
    responses={
        401: {"model": Message},
        409: {"model": Message, "description": "the same event id is being scored right now"},
        413: {"model": Message},
        422: {"model": ValidationProblems},
        503: {"model": Message, "description": "store unavailable (fail-closed mode)"},
    },
)
async def score(body: EventIn, runtime: RuntimeDep) -> Response:
    event = body.to_event()
    result = await _score(runtime, event)
    runtime.metrics.answered(result.decision, runtime.engine.fusion.snapshot.version)
    shadow = (
        event.current_decision is not None
        and result.state_available
        and not result.duplicate
        and hasattr(runtime.store, "append_shadow")
    )
    task = BackgroundTask(_append_shadow, runtime, event, result) if shadow else None
    return Response(score_json(result), media_type=JSON_TYPE, background=task)


def score_json(result: ScoreResult) -> bytes:
    """The answer's JSON, as FastAPI writes a ``ScoreOut`` (`pydantic` serialisation)."""
    return _SCORE_OUT.dump_json(ScoreOut.of(result))
