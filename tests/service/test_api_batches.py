"""``POST /v1/events`` and ``POST /v1/labels`` on the embedded store: per-item outcome counts."""

from __future__ import annotations

import pytest
from test_api_support import T0, event, inject, running, unavailable

from scoring.config import DAY_S

pytestmark = pytest.mark.anyio


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _label(event_id: str, is_fraud: object, days_after: float = 2.0) -> dict[str, object]:
    return {"event_id": event_id, "labeled_at": T0 + days_after * DAY_S, "is_fraud": is_fraud}


async def test_events_are_recorded_once_and_counted() -> None:
    batch = {"events": [event(n) for n in range(5)]}
    async with running() as (client, _):
        first = (await client.post("/v1/events", json=batch)).json()
        again = (await client.post("/v1/events", json=batch)).json()
        stats = (await client.get("/v1/reputation/device/dev-alpha")).json()
    assert first == {"received": 5, "recorded": 5, "duplicate": 0}
    assert again == {"received": 5, "recorded": 0, "duplicate": 5}
    assert stats["events"]["1h"] == pytest.approx(sum(2 ** (-(4 - n) / 3600) for n in range(5)))


async def test_a_batch_cut_by_a_store_failure_says_how_far_it_got() -> None:
    async with running() as (client, app):
        await client.post("/v1/events", json={"events": [event(0), event(1)]})
        inject(app, {"begin": unavailable})
        reply = await client.post("/v1/events", json={"events": [event(n) for n in range(4)]})
    assert reply.status_code == 503
    assert reply.json()["detail"] == (
        "the store is unavailable (recording events); retry later: 0 of 4 recorded first; "
        "resending the batch is safe"
    )


async def test_labels_are_applied_at_once_with_outcomes() -> None:
    async with running() as (client, _):
        scored = [(await client.post("/v1/score", json=event(n))).json() for n in range(3)]
        first = await client.post(
            "/v1/labels",
            json={"labels": [_label("ev-0", True), _label("ev-1", 0), _label("no-such", 1)]},
        )
        second = await client.post(
            "/v1/labels", json={"labels": [_label("ev-0", True), _label("ev-1", True)]}
        )
        after = (await client.post("/v1/score", json=event(9))).json()
    assert first.status_code == 200
    assert first.json() == {
        "received": 3,
        "applied": 2,
        "changed": 0,
        "duplicate": 0,
        "unknown_event": 1,
        "queued": 0,
    }
    assert second.json() == {
        "received": 2,
        "applied": 0,
        "changed": 1,
        "duplicate": 1,
        "unknown_event": 0,
        "queued": 0,
    }
    assert all(s["model_version"] == 0 for s in scored)
    assert after["model_version"] > 0  # each applied label published a new model at once


async def test_label_lag_is_measured_from_the_event_time() -> None:
    async with running() as (client, _):
        await client.post("/v1/score", json=event(0))
        await client.post("/v1/labels", json={"labels": [_label("ev-0", True, days_after=3.0)]})
        text = (await client.get("/metrics")).text
    assert "emberscore_label_lag_seconds_count 1.0" in text
    assert f"emberscore_label_lag_seconds_sum {3 * DAY_S}" in text
    assert 'emberscore_labels_total{outcome="applied"} 1.0' in text
