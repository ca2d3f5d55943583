"""``/healthz``, ``/readyz``, ``/metrics`` and the OpenAPI pages.

The metrics text is read back with prometheus_client's own parser
(`prometheus_client.parser.text_string_to_metric_families`), the reference for the format.
"""

from __future__ import annotations

import asyncio

import pytest
from prometheus_client.parser import text_string_to_metric_families
from test_api_support import event, inject, running, settings, stall, unavailable

pytestmark = pytest.mark.anyio


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


async def test_alive_and_ready_on_the_embedded_store() -> None:
    async with running() as (client, _):
        alive = await client.get("/healthz")
        ready = await client.get("/readyz")
    assert alive.json() == {"status": "alive"}
    assert ready.status_code == 200
    assert ready.json() == {"ready": True, "store": "ok", "model": "ok", "model_version": 0}


@pytest.mark.parametrize(
    ("fault", "words"),
    [(unavailable, "unreachable: injected fault"), (stall(10.0), "unreachable: no answer within")],
    ids=["store down", "store stalls"],
)
async def test_not_ready_names_the_failed_part(fault: object, words: str) -> None:
    async with running() as (client, app):
        inject(app, {"ping": fault})  # type: ignore[dict-item]
        answer = await asyncio.wait_for(client.get("/readyz"), 5.0)
        alive = await client.get("/healthz")
    assert answer.status_code == 503
    body = answer.json()
    assert body["ready"] is False
    assert body["store"].startswith(words)
    assert body["model"] == "ok"
    assert alive.status_code == 200  # alive, just not ready


async def test_metrics_parse_and_use_route_templates() -> None:
    async with running() as (client, _):
        await client.post("/v1/score", json=event(1))
        await client.post("/v1/score", json={"event_id": "broken"})
        await client.get("/v1/reputation/email/shopper1%40quillpost.example")
        reply = await client.get("/metrics")
    assert reply.headers["content-type"].startswith("text/plain")
    families = {f.name: f for f in text_string_to_metric_families(reply.text)}
    for name in (
        "emberscore_request_duration_seconds",
        "emberscore_decisions",
        "emberscore_store_errors",
        "emberscore_fail_open_answers",
        "emberscore_model_version",
        "emberscore_label_lag_seconds",
        "emberscore_labels",
    ):
        assert name in families, name
    latency = families["emberscore_request_duration_seconds"]
    assert latency.type == "histogram"
    routes = {s.labels["route"] for s in latency.samples}
    assert {"/v1/score", "/v1/reputation/{kind}/{value:path}"} <= routes
    statuses = {(s.labels["route"], s.labels["status"]) for s in latency.samples}
    assert ("/v1/score", "422") in statuses
    decisions = [s for s in families["emberscore_decisions"].samples if s.name.endswith("_total")]
    assert sum(s.value for s in decisions) == 1.0
    assert "quillpost" not in reply.text  # no raw path, so no identifier value


async def test_openapi_documents_every_route() -> None:
    async with running() as (client, _):
        docs = await client.get("/docs")
        spec = (await client.get("/openapi.json")).json()
    assert docs.status_code == 200
    assert {
        "/v1/score",
        "/v1/events",
        "/v1/labels",
        "/v1/reputation/{kind}/{value}",
        "/healthz",
        "/readyz",
        "/metrics",
    } <= set(spec["paths"])
    assert "X-API-Key" in str(spec["components"]["securitySchemes"])


async def test_reference_endpoint_only_when_asked() -> None:
    async with running() as (client, _):
        absent = await client.post("/v1/reference", json=event(1))
    async with running(settings(reference_endpoint=True)) as (client, _):
        present = await client.post("/v1/reference", json=event(1))
    assert absent.status_code == 404
    assert present.status_code == 503  # it needs the Redis store
