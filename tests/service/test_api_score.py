"""``POST /v1/score`` on the embedded store: answers, idempotency, concurrency, store failures.

The reference for every score is the engine itself driven directly (one scoring core, three
callers: DESIGN.md tenet 1): the HTTP answers must equal it number for number.
"""

from __future__ import annotations

import asyncio

import disposable_email_domains
import pytest
from test_api_support import (
    event,
    inject,
    running,
    settings,
    stall,
    unavailable,
    wait_for,
)

from scoring.event import Event
from scoring.fusion import Fusion
from scoring.hashing import KeyHasher
from service.engine import Engine
from service.stores.memory import MemoryStore
from service.workers.learner import Learner

pytestmark = pytest.mark.anyio

FIELDS = {
    "event_id",
    "risk",
    "decision",
    "reasons",
    "reason_codes",
    "model_version",
    "duplicate",
    "state_available",
}


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _stream() -> list[dict[str, object]]:
    """One device shared by ever more accounts within minutes: a burst the scorer should see."""
    return [event(n * 60, account_id=f"acct-{n}", email=None) for n in range(12)]


async def _reference(bodies: list[dict[str, object]]) -> list[tuple[float, str, list[str]]]:
    s = settings()
    config = s.scoring_config()
    store = MemoryStore(config, s.idempotency_ttl_s, s.label_horizon_s)
    fusion = Fusion(config)
    engine = Engine(
        store, config, KeyHasher(s.secret_bytes()), fusion, Learner(store, config, fusion)
    )
    out = []
    for b in bodies:
        ev = Event(
            str(b["event_id"]),
            float(b["ts"]),  # type: ignore[arg-type]
            str(b["type"]),
            account_id=b.get("account_id"),  # type: ignore[arg-type]
            ip=b.get("ip"),  # type: ignore[arg-type]
            device_id=b.get("device_id"),  # type: ignore[arg-type]
            phone=b.get("phone"),  # type: ignore[arg-type]
            email=b.get("email"),  # type: ignore[arg-type]
            amount=b.get("amount"),  # type: ignore[arg-type]
        )
        r = await engine.score(ev)
        out.append((round(r.risk, 6), r.decision, list(r.reasons)))  # answers give 6 decimals
    return out


async def test_answers_equal_the_engine_driven_directly() -> None:
    bodies = _stream()
    expected = await _reference(bodies)
    async with running() as (client, _):
        answers = [(await client.post("/v1/score", json=b)).json() for b in bodies]
    assert all(set(a) == FIELDS for a in answers)
    got = [(a["risk"], a["decision"], a["reasons"]) for a in answers]
    assert got == expected
    assert answers[-1]["risk"] > answers[0]["risk"]  # the burst raised the risk
    assert all(0.0 <= a["risk"] <= 1.0 and a["state_available"] for a in answers)
    assert all(len(a["reasons"]) == len(a["reason_codes"]) for a in answers)


async def test_retry_returns_the_first_answer_marked_duplicate() -> None:
    async with running() as (client, _):
        first = (await client.post("/v1/score", json=event(1))).json()
        # Same event id, other content: still the first answer (idempotent on event_id).
        again = (await client.post("/v1/score", json=event(1, device_id="dev-other"))).json()
        count = (await client.get("/v1/reputation/device/dev-alpha")).json()["events"]["1h"]
    assert first["duplicate"] is False
    assert again["duplicate"] is True
    assert {k: v for k, v in again.items() if k != "duplicate"} == {
        k: v for k, v in first.items() if k != "duplicate"
    }
    assert count == pytest.approx(1.0)  # recorded once, not twice


async def test_concurrent_duplicate_is_409_with_a_clear_message() -> None:
    gate, entered = asyncio.Event(), asyncio.Event()
    async with running(settings(score_budget_ms=30_000)) as (client, app):
        inject(app, {"commit": wait_for(gate, entered)})
        first = asyncio.create_task(client.post("/v1/score", json=event(7)))
        await entered.wait()  # the first request is between its claim and its commit
        second = await client.post("/v1/score", json=event(7))
        gate.set()
        done = await first
    assert second.status_code == 409
    assert "being scored by another request" in second.json()["detail"]
    assert done.status_code == 200
    assert done.json()["duplicate"] is False


async def test_fail_open_answers_from_the_event_alone() -> None:
    disposable = sorted(disposable_email_domains.blocklist)[0]
    body = event(3, email=f"someone@{disposable}", current_decision="allow")
    async with running(settings(on_store_failure="open")) as (client, app):
        faulty = inject(app, {"begin": unavailable})
        reply = await client.post("/v1/score", json=body)
        metrics = (await client.get("/metrics")).text
    answer = reply.json()
    assert reply.status_code == 200
    assert answer["state_available"] is False
    assert answer["duplicate"] is False
    assert "email.disposable" in answer["reason_codes"]
    assert "append_shadow" not in faulty.calls  # no shadow line for an answer without state
    assert "emberscore_fail_open_answers_total 1.0" in metrics
    assert 'emberscore_store_errors_total{cause="unavailable",operation="score"} 1.0' in metrics


async def test_fail_open_when_the_store_is_slower_than_the_budget() -> None:
    """The store stalls for 10 s; the answer comes from the budget (20 ms), not the store."""
    async with running(settings(score_budget_ms=20)) as (client, app):
        inject(app, {"begin": stall(10.0)})
        answer = await asyncio.wait_for(client.post("/v1/score", json=event(4)), 5.0)
        metrics = (await client.get("/metrics")).text
    assert answer.status_code == 200
    assert answer.json()["state_available"] is False
    assert 'emberscore_store_errors_total{cause="timeout",operation="score"} 1.0' in metrics


async def test_fail_closed_answers_503() -> None:
    async with running(settings(on_store_failure="closed", score_budget_ms=20)) as (client, app):
        inject(app, {"begin": stall(10.0)})
        slow = await asyncio.wait_for(client.post("/v1/score", json=event(5)), 5.0)
        inject(app, {"begin": unavailable})
        down = await client.post("/v1/score", json=event(6))
    for reply in (slow, down):
        assert reply.status_code == 503
        assert reply.json()["detail"].startswith("the store is unavailable (scoring)")
        assert reply.headers["retry-after"] == "1"
