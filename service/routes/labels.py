"""``POST /v1/labels``: what became known about past events.

With the embedded store, labels are applied at once by the in-process learner (200, with the
outcome of each). With Redis they are queued for the learner process (``emberscore learn``),
which applies each exactly once (202, with the number queued). Either way a label changes the
statistics only from the moment it is applied, never from its event's time.
"""

from __future__ import annotations

from fastapi import APIRouter, Response

from scoring.logrecord import RecordError
from service.api_models import LabelBatch, LabelIn, LabelsOut, Message, ValidationProblems
from service.routes.deps import ApiKey, Runtime, RuntimeDep
from service.routes.events import check_batch
from service.workers.learner import LabelOutcome

router = APIRouter(prefix="/v1", tags=["labels"], dependencies=[ApiKey])


async def _event_time(runtime: Runtime, digest: bytes) -> float | None:
    data = await runtime.bounded("reading a record", runtime.store.load_record(digest))
    if data is None:
        return None
    try:
        return float(runtime.engine.codec.decode(data).ts_s)
    except RecordError:
        return None


async def _apply(runtime: Runtime, labels: list[LabelIn]) -> LabelsOut:
    out = LabelsOut(received=len(labels))
    hasher = runtime.engine.hasher
    for label in labels:
        ts_s = await _event_time(runtime, hasher.hash_text("event", label.event_id))
        if ts_s is not None:
            runtime.metrics.label_lag.observe(max(label.labeled_at - ts_s, 0.0))
        outcome = await runtime.bounded(
            "applying labels", runtime.engine.label(label.event_id, label.is_fraud)
        )
        runtime.metrics.labels.labels(outcome.value).inc()
        if outcome in (LabelOutcome.APPLIED, LabelOutcome.CHANGED):
            out.applied += outcome is LabelOutcome.APPLIED
            out.changed += outcome is LabelOutcome.CHANGED
        elif outcome is LabelOutcome.DUPLICATE:
            out.duplicate += 1
        else:
            out.unknown_event += 1
    return out


async def _queue(runtime: Runtime, labels: list[LabelIn]) -> LabelsOut:
    hasher = runtime.engine.hasher
    items = [
        (hasher.hash_text("event", label.event_id), label.is_fraud, label.labeled_at)
        for label in labels
    ]
    await runtime.bounded("queueing labels", runtime.store.enqueue_labels(items))
    return LabelsOut(received=len(labels), queued=len(items))


@router.post(
    "/labels",
    response_model=LabelsOut,
    summary="Apply (embedded store) or queue (Redis) a batch of labels",
    responses={
        202: {"model": LabelsOut, "description": "queued for the learner process (Redis)"},
        401: {"model": Message},
        413: {"model": Message},
        422: {"model": ValidationProblems},
        503: {"model": Message, "description": "store unavailable; resending is safe"},
    },
)
async def post_labels(body: LabelBatch, runtime: RuntimeDep, response: Response) -> LabelsOut:
    check_batch("labels", len(body.labels), runtime.settings.max_batch)
    if runtime.engine.learner is not None:
        return await _apply(runtime, body.labels)
    response.status_code = 202
    return await _queue(runtime, body.labels)
