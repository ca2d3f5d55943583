"""``GET /healthz`` (the process answers), ``GET /readyz`` (it can score), ``GET /metrics``.

These need no API key: orchestrators and metric scrapers call them, and they reveal no
identifier. Readiness asks the store for a ping within ``store_timeout_ms`` and checks that the
model in use is the latest one that could be loaded; a 503 says which part failed.
"""

from __future__ import annotations

import asyncio

from fastapi import APIRouter, Response
from fastapi.responses import JSONResponse

from service.api_models import Readiness
from service.metrics import CONTENT_TYPE
from service.routes.deps import RuntimeDep
from service.stores.base import StoreUnavailable

router = APIRouter(tags=["operations"])


@router.get("/healthz", summary="The process is alive")
async def healthz() -> dict[str, str]:
    return {"status": "alive"}


async def _store_state(runtime: RuntimeDep) -> str:
    try:
        async with asyncio.timeout(runtime.store_timeout_s):
            reachable = await runtime.store.ping()
    except TimeoutError:
        return f"unreachable: no answer within {runtime.settings.store_timeout_ms:.0f} ms"
    except StoreUnavailable as exc:
        return f"unreachable: {exc}"
    return "ok" if reachable else "unreachable: ping failed"


@router.get(
    "/readyz",
    response_model=Readiness,
    summary="The store is reachable and the model loaded",
    responses={503: {"model": Readiness, "description": "not ready: says which part failed"}},
)
async def readyz(runtime: RuntimeDep) -> JSONResponse:
    store = await _store_state(runtime)
    model = runtime.model_problem or "ok"
    body = Readiness(
        ready=store == "ok" and model == "ok",
        store=store,
        model=model,
        model_version=runtime.engine.fusion.snapshot.version,
    )
    return JSONResponse(body.model_dump(), status_code=200 if body.ready else 503)


@router.get("/metrics", summary="Prometheus metrics (text format)", response_class=Response)
async def metrics(runtime: RuntimeDep) -> Response:
    runtime.metrics.model_version.set(runtime.engine.fusion.snapshot.version)
    counters = getattr(runtime.store, "counters", None)
    if isinstance(counters, dict):  # the Redis store's write-behind queue
        for state, value in counters.items():
            runtime.metrics.write_behind.labels(state).set(value)
    return Response(runtime.metrics.exposition(), media_type=CONTENT_TYPE)
