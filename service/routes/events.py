"""``POST /v1/events``: record a batch of events without scoring them.

Each event changes the statistics exactly as a scored one would; an event id seen before is
counted as a duplicate and changes nothing, so a batch that failed half-way can be sent again.
"""

from __future__ import annotations

from fastapi import APIRouter, HTTPException

from service.api_models import EventBatch, EventsOut, Message, ValidationProblems
from service.routes.deps import ApiKey, FieldError, RuntimeDep, store_unavailable

router = APIRouter(prefix="/v1", tags=["scoring"], dependencies=[ApiKey])


def check_batch(field: str, size: int, max_batch: int) -> None:
    if size > max_batch:
        raise FieldError(
            field, f"{size} items is more than the {max_batch} allowed per request: split the batch"
        )


@router.post(
    "/events",
    response_model=EventsOut,
    summary="Record a batch of events without scoring",
    responses={
        401: {"model": Message},
        413: {"model": Message},
        422: {"model": ValidationProblems},
        503: {"model": Message, "description": "store unavailable; resending is safe"},
    },
)
async def record_events(body: EventBatch, runtime: RuntimeDep) -> EventsOut:
    check_batch("events", len(body.events), runtime.settings.max_batch)
    out = EventsOut(received=len(body.events), recorded=0, duplicate=0)
    for item in body.events:
        try:
            new = await runtime.bounded("recording events", runtime.engine.record(item.to_event()))
        except HTTPException as exc:
            raise store_unavailable(
                "recording events",
                f": {out.recorded} of {out.received} recorded first; resending the batch is safe",
            ) from exc
        if new:
            out.recorded += 1
        else:
            out.duplicate += 1
    return out
