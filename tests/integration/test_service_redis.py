"""The HTTP service on a real redis-server: score, label, learner, model reload, shadow log.

The round trip is the production path end to end: events scored through the API, labels
queued by the API (202), the learner process's loop run once, the published snapshot picked up
by the API's model poller, and the next answer given by the new model version.
"""

from __future__ import annotations

import asyncio
import math
from datetime import datetime
from typing import Any

import pytest
from test_service_redis_support import (
    T0,
    FaultyStore,
    event,
    eventually,
    flush,
    redis_settings,
    running,
    runtime_of,
)

from scoring.config import DAY_S
from service.workers.learn_loop import learn

pytestmark = [pytest.mark.redis, pytest.mark.anyio]


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


async def test_score_label_learn_reload_round_trip(redis_url: str) -> None:
    config = redis_settings(redis_url)
    async with running(config) as (client, app):
        answers = [(await client.post("/v1/score", json=event(n))).json() for n in range(6)]
        assert all(a["state_available"] and a["model_version"] == 0 for a in answers)
        labels = [
            {"event_id": f"ev-{n}", "labeled_at": T0 + 2 * DAY_S, "is_fraud": n % 2 == 0}
            for n in range(6)
        ]
        queued = await client.post("/v1/labels", json={"labels": labels})
        assert queued.status_code == 202
        assert queued.json()["queued"] == 6
        await flush(app)  # the records are written behind the requests

        stats = await learn(config, once=True)
        assert stats.outcomes == {"applied": 6}
        assert stats.model_version >= 1
        assert len(stats.outcomes) == 1

        async def reloaded() -> bool:
            return runtime_of(app).engine.fusion.snapshot.version == stats.model_version

        assert await eventually(reloaded)
        after = (await client.post("/v1/score", json=event(99))).json()
        device = (await client.get("/v1/reputation/device/dev-shared")).json()
        ready = (await client.get("/readyz")).json()
    assert after["model_version"] == stats.model_version
    assert device["labels"]["fraud"] > 0.0
    assert device["labels"]["legitimate"] > 0.0
    assert ready == {
        "ready": True,
        "store": "ok",
        "model": "ok",
        "model_version": stats.model_version,
    }


async def test_retry_and_concurrent_duplicate_on_redis(redis_url: str) -> None:
    gate, entered = asyncio.Event(), asyncio.Event()

    async def hold() -> None:
        entered.set()
        await gate.wait()

    async with running(redis_settings(redis_url)) as (client, app):
        first = (await client.post("/v1/score", json=event(1))).json()
        await flush(app)
        retry = (await client.post("/v1/score", json=event(1))).json()
        runtime = runtime_of(app)
        real = runtime.store
        runtime.engine.store = FaultyStore(real, {"commit": hold})  # type: ignore[assignment]
        slow = asyncio.create_task(client.post("/v1/score", json=event(2)))
        await entered.wait()  # claimed in Redis, not yet committed
        clash = await client.post("/v1/score", json=event(2))
        gate.set()
        done = await slow
    assert retry["duplicate"] is True
    assert {k: v for k, v in retry.items() if k != "duplicate"} == {
        k: v for k, v in first.items() if k != "duplicate"
    }
    assert clash.status_code == 409
    assert "being scored by another request" in clash.json()["detail"]
    assert done.status_code == 200


async def test_current_decision_goes_to_the_live_shadow_log(redis_url: str) -> None:
    async with running(redis_settings(redis_url)) as (client, app):
        shadowed = (await client.post("/v1/score", json=event(1, current_decision="review"))).json()
        await client.post("/v1/score", json=event(1, current_decision="review"))  # retry: no line
        await client.post("/v1/score", json=event(2))  # no current decision: no line
        await flush(app)
        table = await runtime_of(app).store.read_shadow()
    assert table.event_id == ["ev-1"]
    assert table.decision == [shadowed["decision"]]
    assert table.current_decision == ["review"]
    assert table.risk[0] == pytest.approx(shadowed["risk"], abs=1e-6)


async def test_an_unusable_snapshot_makes_the_service_not_ready(redis_url: str) -> None:
    async with running(redis_settings(redis_url)) as (client, app):
        store = runtime_of(app).store
        await store.save_snapshot(b"\x93not a snapshot", 7)

        async def reported() -> bool:
            return (await client.get("/readyz")).status_code == 503

        assert await eventually(reported)
        body = (await client.get("/readyz")).json()
        answer = await client.post("/v1/score", json=event(1))
    assert body["store"] == "ok"
    assert body["model"].startswith("published snapshot version 7 not usable")
    assert answer.status_code == 200  # the model in use keeps answering
    assert answer.json()["model_version"] == 0


async def test_labels_in_redis_mode_are_queued_not_applied(redis_url: str) -> None:
    async with running(redis_settings(redis_url)) as (client, _app):
        await client.post("/v1/score", json=event(1))
        reply = await client.post(
            "/v1/labels", json={"labels": [{"event_id": "ev-1", "labeled_at": T0, "is_fraud": 1}]}
        )
        device: Any = (await client.get("/v1/reputation/device/dev-shared")).json()
    assert reply.status_code == 202
    assert reply.json() == {
        "received": 1,
        "applied": 0,
        "changed": 0,
        "duplicate": 0,
        "unknown_event": 0,
        "queued": 1,
    }
    assert device["labels"]["fraud"] == 0.0  # the learner process applies it, not the API


async def test_events_batch_on_redis_counts_duplicates(redis_url: str) -> None:
    batch = {"events": [event(n) for n in range(5)]}
    async with running(redis_settings(redis_url)) as (client, app):
        first = (await client.post("/v1/events", json=batch)).json()
        await flush(app)
        again = (await client.post("/v1/events", json=batch)).json()
        device = (await client.get("/v1/reputation/device/dev-shared")).json()
    assert first == {"received": 5, "recorded": 5, "duplicate": 0}
    assert again == {"received": 5, "recorded": 0, "duplicate": 5}
    as_of = datetime.fromisoformat(device["as_of"].replace("Z", "+00:00")).timestamp()
    once = math.fsum(2.0 ** (-(as_of - (T0 + n)) / (30 * DAY_S)) for n in range(5))
    assert device["events"]["30d"] == pytest.approx(once, abs=2e-6)  # duplicates undone
    assert device["first_seen"] == "2026-09-21T14:13:20Z"


async def test_shadow_command_builds_the_report_from_the_live_log(
    redis_url: str, tmp_path: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    """`emberscore shadow --from REDIS_URL` reads the live log the service wrote."""
    from service.cli import main

    decisions = ["allow", "review", "deny", "allow", "allow"]
    async with running(redis_settings(redis_url)) as (client, app):
        for n, current in enumerate(decisions):
            answer = await client.post("/v1/score", json=event(n, current_decision=current))
            assert answer.status_code == 200
        await flush(app)
    report = tmp_path / "live.html"
    status = await asyncio.to_thread(main, ["shadow", "--from", redis_url, "--html", str(report)])
    assert status == 0
    html = report.read_text(encoding="utf-8")
    assert "Keep a human review path" in html
    assert "disparate impact" in html
    summary = capsys.readouterr().out
    assert ": 5 events," in summary  # the five logged events are the report's events
