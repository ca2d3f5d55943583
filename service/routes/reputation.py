"""``GET`` and ``DELETE /v1/reputation/{kind}/{value}``: one identifier's statistics, and erasure.

``value`` is the raw identifier, URL-encoded (slashes allowed, for networks in CIDR text). It is
normalised and keyed-hashed like an event's field; the raw value is never stored or logged.
Erasure removes the identifier's statistics at once; learning records that name its keyed hash
expire with the label horizon.
"""

from __future__ import annotations

import logging
import time
from typing import Any

from fastapi import APIRouter, HTTPException, Response

from service.api_models import Message, ValidationProblems
from service.reputation import NoKeyError, UnknownKindError
from service.routes.deps import ApiKey, FieldError, Runtime, RuntimeDep

router = APIRouter(prefix="/v1/reputation", tags=["reputation"], dependencies=[ApiKey])
log = logging.getLogger("emberscore.service")
PATH = "/{kind}/{value:path}"
RESPONSES: dict[int | str, dict[str, Any]] = {
    401: {"model": Message},
    404: {"model": Message, "description": "no statistics for this identifier"},
    422: {"model": ValidationProblems},
    503: {"model": Message},
}


def _key(runtime: Runtime, kind: str, value: str) -> tuple[str, bytes]:
    try:
        return runtime.reputation.key(kind, value)
    except UnknownKindError as exc:
        raise FieldError("kind", str(exc)) from exc
    except NoKeyError as exc:
        raise FieldError("value", str(exc)) from exc


def _not_found(kind: str) -> HTTPException:
    return HTTPException(404, f"no statistics for this {kind}: never seen, expired or erased")


@router.get(PATH, summary="Statistics of one identifier", responses=RESPONSES)
async def get_reputation(kind: str, value: str, runtime: RuntimeDep) -> dict[str, object]:
    kind, digest = _key(runtime, kind, value)
    profile = await runtime.bounded("reputation", runtime.store.profile(kind, digest))
    if profile is None:
        raise _not_found(kind)
    return runtime.reputation.statistics(kind, digest, profile, time.time())


@router.delete(
    PATH, status_code=204, summary="Erase one identifier's statistics", responses=RESPONSES
)
async def erase(kind: str, value: str, runtime: RuntimeDep) -> Response:
    kind, digest = _key(runtime, kind, value)
    if not await runtime.bounded("erasure", runtime.store.erase(kind, digest)):
        raise _not_found(kind)
    log.info("erased the statistics of %s %s", kind, digest.hex())
    return Response(status_code=204)
