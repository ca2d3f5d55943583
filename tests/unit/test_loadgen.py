"""The open-loop load generator: schedule, percentiles, target refusal, and short real runs.

The runs go against a real uvicorn server started in a thread on a free loopback port, serving a
tiny app (no emberscore code). Nothing here asserts how fast anything is: the only time bounds are
inherent ones (a request cannot finish before the server's sleep, nor before the requests queued
ahead of it on a one-at-a-time server).
"""

from __future__ import annotations

import asyncio
import json
import math
import socket
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pytest
import uvicorn
from fastapi import FastAPI, Request, Response
from fastapi.testclient import TestClient
from hypothesis import given
from hypothesis import strategies as st
from pydantic import SecretStr
from redis import asyncio as aioredis

from loadtest.load import (
    LatencySummary,
    LoadConfig,
    LoadError,
    LoadReport,
    NonLocalTargetError,
    format_report,
    intended_offset_s,
    percentile,
    prepare_bodies,
    request_count,
    run_load,
)
from loadtest.load_http import body_prefixes, full_request, parse_target, scenario_events
from scoring.config import ScoringConfig
from scoring.event import EventPlan, Planner
from scoring.hashing import KeyHasher
from service.app import create_app
from service.config import Settings
from service.replay import event_at
from service.routes import reference
from service.routes.reference import (
    SCRATCH_TTL_S,
    reference_plan,
    round_trip,
    scratch_digest,
    scratch_key,
)
from service.scenario import ScenarioParams, generate
from service.stores.redis import RedisStore
from service.stores.redis_keys import WritePlanner

SLOW_S = 0.05  # the slow route's service time; it blocks its event loop, so one at a time


# --- the schedule ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("duration_s", "rate_per_s", "expected"),
    [
        (2.0, 40.0, 80),
        (60.0, 1000.0, 60_000),
        (1.0, 2.5, 3),  # intended at 0, 0.4, 0.8 s: all before the end
        (0.3, 10.0, 3),  # 0.3 * 10 is 3.0000000000000004 in binary floating point
        (0.7, 10.0, 7),
        (0.01, 10.0, 1),  # request 0 is intended at the start itself
    ],
)
def test_request_count_counts_requests_intended_before_the_end(
    duration_s: float, rate_per_s: float, expected: int
) -> None:
    assert request_count(duration_s, rate_per_s) == expected


@given(
    st.floats(min_value=0.01, max_value=3600.0),
    st.floats(min_value=0.1, max_value=50_000.0),
)
def test_schedule_ends_at_the_duration(duration_s: float, rate_per_s: float) -> None:
    n = request_count(duration_s, rate_per_s)
    assert n >= 1
    assert intended_offset_s(n - 1, rate_per_s) < duration_s * (1 + 1e-9)
    assert intended_offset_s(n, rate_per_s) >= duration_s * (1 - 1e-9)


@given(st.floats(min_value=0.1, max_value=50_000.0))
def test_intended_times_do_not_drift(rate_per_s: float) -> None:
    """Each time is i / rate, computed afresh: equal to numpy's elementwise division, with no
    error accumulated over a million intervals (a running sum would drift)."""
    i = np.arange(0, 1_000_001, 1000)
    ours = np.array([intended_offset_s(int(k), rate_per_s) for k in i])
    assert np.array_equal(ours, i / rate_per_s)
    assert np.all(np.diff(ours) > 0)


# --- percentiles, against numpy.percentile as the reference -----------------------------------

QUANTILES = (0.0, 1.0, 25.0, 50.0, 90.0, 95.0, 99.0, 99.9, 100.0)


@given(
    st.lists(st.floats(min_value=0.0, max_value=1e6), min_size=1, max_size=300),
    st.sampled_from(QUANTILES) | st.floats(min_value=0.0, max_value=100.0),
)
def test_percentile_matches_numpy_linear(values: list[float], q: float) -> None:
    """Reference: numpy.percentile with method="linear" (numpy's default; definition 7 of
    Hyndman and Fan, "Sample quantiles in statistical packages", 1996)."""
    expected = float(np.percentile(np.array(values), q, method="linear"))
    assert percentile(sorted(values), q) == pytest.approx(expected, rel=1e-12, abs=1e-9)


def test_summary_matches_numpy_on_a_skewed_sample() -> None:
    """A latency-like sample (lognormal body, a few huge outliers), reference numpy.percentile
    (method="linear") in milliseconds."""
    rng = np.random.default_rng(11)
    samples = np.concatenate([rng.lognormal(-5.0, 0.6, 9_990), rng.uniform(1.0, 3.0, 10)])
    summary = LatencySummary.of(samples.tolist())
    ms = samples * 1000.0
    ref = np.percentile(ms, [50.0, 95.0, 99.0, 99.9], method="linear")
    ours = [summary.p50_ms, summary.p95_ms, summary.p99_ms, summary.p999_ms]
    assert ours == pytest.approx(ref.tolist(), rel=1e-12)
    assert summary.max_ms == pytest.approx(float(ms.max()), rel=1e-15)
    assert summary.count == len(samples)


def test_percentile_of_nothing_is_nan_and_out_of_range_is_refused() -> None:
    assert math.isnan(percentile([], 50.0))
    with pytest.raises(ValueError, match="from 0 to 100"):
        percentile([1.0], 100.5)


# --- targets: this machine only ----------------------------------------------------------------


@pytest.mark.parametrize(
    "url",
    [
        "http://127.0.0.1:8080/v1/score",  # IPv4 loopback address (RFC 1122 section 3.2.1.3)
        "http://[::1]:8080/v1/score",  # IPv6 loopback address (RFC 4291 section 2.5.3)
        "http://localhost:8080/v1/score",  # reserved loopback name (RFC 6761 section 6.3)
        "http://127.0.0.1/",  # default port 80 (RFC 9110 section 4.2.1)
    ],
)
def test_loopback_targets_are_accepted(url: str) -> None:
    target = parse_target(url)
    assert target.host in ("127.0.0.1", "::1", "localhost")


@pytest.mark.parametrize(
    "url",
    [
        "http://10.0.0.5:8080/v1/score",  # private network: another machine
        "http://192.0.2.10/v1/score",  # documentation range (RFC 5737), still not this machine
        "http://example.com/v1/score",
        "http://localhost.example/v1/score",
        "http://127.0.0.1.example/v1/score",
        "http://0.0.0.0:8080/",  # "any address", not a destination
        "http://127.0.0.2/",  # loopback too, but outside the three names the tool allows
        "http://[::ffff:127.0.0.1]/",  # spelled differently: refused rather than interpreted
        "http://user@127.0.0.1/",  # credentials in a URL are refused
    ],
)
def test_other_hosts_are_refused_with_a_clear_message(url: str) -> None:
    with pytest.raises(NonLocalTargetError, match="this machine only"):
        parse_target(url)


@pytest.mark.parametrize("url", ["https://127.0.0.1/", "127.0.0.1:8080", "ftp://localhost/"])
def test_other_schemes_are_refused(url: str) -> None:
    with pytest.raises(LoadError, match="http://"):
        parse_target(url)


def test_run_refuses_a_remote_target_before_sending() -> None:
    config = LoadConfig("http://198.51.100.7:8080/v1/score", rate_per_s=10.0, duration_s=1.0)
    with pytest.raises(NonLocalTargetError):
        asyncio.run(run_load(config, [b"{"] * 10))


@pytest.mark.parametrize(
    ("rate", "duration", "connections", "message"),
    [(0.0, 1.0, 1, "--rate"), (math.nan, 1.0, 1, "--rate"), (5.0, -1.0, 1, "--duration"),
     (5.0, 1.0, 0, "--connections")],
)  # fmt: skip
def test_bad_options_are_refused(
    rate: float, duration: float, connections: int, message: str
) -> None:
    config = LoadConfig("http://127.0.0.1:9/", rate, duration, connections)
    with pytest.raises(LoadError, match=message):
        config.check()


# --- request bytes ---------------------------------------------------------------------------


def test_bodies_are_json_with_fresh_ids_and_the_event_time() -> None:
    events = scenario_events(1_000, seed=3)
    prefixes = body_prefixes(events, 2_500, "run1")
    bodies = [json.loads(p + b"1790000000.125}") for p in prefixes]
    assert len({b["event_id"] for b in bodies}) == 2_500
    assert all(b["ts"] == 1_790_000_000.125 for b in bodies)
    assert {b["type"] for b in bodies} <= {"signup", "login", "checkout"}
    assert all("current_decision" not in b for b in bodies)
    assert all("ts" not in e and "event_id" not in e for e in events)
    request = full_request(b"POST / HTTP/1.1\r\nContent-Length: ", prefixes[0], 1.5)
    head, _, body = request.partition(b"\r\n\r\n")
    assert int(head.rsplit(b" ", 1)[1]) == len(body)


# --- real runs against a server in a thread --------------------------------------------------


@dataclass
class Received:
    """What the test server saw: parsed bodies with the wall time each arrived."""

    bodies: list[tuple[dict[str, object], float]] = field(default_factory=list)


def _app(received: Received) -> FastAPI:
    app = FastAPI()

    @app.post("/fast")
    async def fast(request: Request) -> dict[str, bool]:
        received.bodies.append((json.loads(await request.body()), time.time()))
        return {"ok": True}

    @app.post("/slow")
    async def slow() -> dict[str, bool]:
        time.sleep(SLOW_S)  # blocks the server's loop: requests are served one at a time
        return {"ok": True}

    @app.post("/degraded")
    async def degraded() -> dict[str, object]:
        return {"risk": 0.01, "state_available": False}

    @app.post("/unavailable")
    async def unavailable() -> Response:
        return Response(status_code=503)

    return app


@pytest.fixture(scope="module")
def server() -> Iterator[tuple[str, Received]]:
    received = Received()
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    config = uvicorn.Config(_app(received), log_level="warning", lifespan="off")
    srv = uvicorn.Server(config)
    thread = threading.Thread(target=srv.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    for _ in range(200):
        if srv.started:
            break
        time.sleep(0.05)
    assert srv.started, "the test server did not start"
    yield f"http://127.0.0.1:{port}", received
    srv.should_exit = True
    thread.join(timeout=10)
    sock.close()


def _run(url: str, rate: float, duration: float, connections: int, drain: float) -> LoadReport:
    config = LoadConfig(url, rate, duration, connections=connections, drain_s=drain)
    prefixes = prepare_bodies(request_count(duration, rate), seed=5, distinct=1_000)
    return asyncio.run(run_load(config, prefixes))


def test_short_run_sends_every_request_with_live_times(server: tuple[str, Received]) -> None:
    base, received = server
    received.bodies.clear()
    before = time.time()
    report = _run(base + "/fast", rate=20.0, duration=2.0, connections=4, drain=30.0)
    assert report.scheduled == report.sent == report.ok == 40
    assert report.errors == {}
    assert report.latency.count == 40
    assert len(received.bodies) == 40
    assert len({body["event_id"] for body, _ in received.bodies}) == 40
    for body, arrived in received.bodies:
        ts = body["ts"]
        assert isinstance(ts, float)
        # Inherent order: the intended time is after the run began and before the arrival.
        assert before - 0.001 <= ts <= arrived + 0.001


def test_latency_includes_queueing_when_the_server_is_slower_than_offered(
    server: tuple[str, Received],
) -> None:
    """The coordinated-omission property. The server serves one request at a time in at least
    SLOW_S (20/s at most) while 40/s are offered for 2 s. The k-th answer cannot come before
    k * SLOW_S after the start, and every request was intended within the first 2 s, so the
    latency of the last answers must reach about (80 * SLOW_S - 2 s) = 2 s. A generator that
    measured from its actual send times over a small pool would report roughly SLOW_S instead.
    """
    base, _ = server
    duration, rate = 2.0, 40.0
    report = _run(base + "/slow", rate=rate, duration=duration, connections=2, drain=60.0)
    assert report.ok == 80
    assert report.errors == {}
    assert report.latency.p50_ms >= SLOW_S * 1000 - 1.0
    # The second largest latency is at least (ok - 1) * SLOW_S - duration; p99 of 80 samples
    # lies between the two largest.
    floor_ms = ((report.ok - 1) * SLOW_S - duration) * 1000 - 1.0
    assert report.latency.p99_ms >= floor_ms
    assert report.latency.max_ms >= floor_ms
    assert report.queued > 0  # requests found both connections busy: that wait was counted
    assert report.service.max_ms <= report.latency.max_ms


def test_errors_are_counted_by_status(server: tuple[str, Received]) -> None:
    base, _ = server
    report = _run(base + "/unavailable", rate=10.0, duration=1.0, connections=2, drain=30.0)
    assert report.errors == {"HTTP 503": 10}
    assert report.ok == 0
    assert report.latency.count == 0
    assert "HTTP 503: 10" in format_report(report)


def test_answers_without_state_are_errors(server: tuple[str, Received]) -> None:
    """A 200 that says the store was not reached (fail open) must not pass for a success."""
    base, _ = server
    report = _run(base + "/degraded", rate=10.0, duration=0.5, connections=2, drain=30.0)
    assert report.errors == {'HTTP 200 with "state_available":false': 5}
    assert report.ok == 0


def test_a_closed_port_is_a_clear_error() -> None:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))  # bound but not listening: connections are refused
        url = f"http://127.0.0.1:{sock.getsockname()[1]}/v1/score"
        with pytest.raises(LoadError, match="cannot connect"):
            _run(url, rate=5.0, duration=1.0, connections=1, drain=1.0)


def test_report_shows_figures_and_no_identifier_values(server: tuple[str, Received]) -> None:
    base, received = server
    report = _run(base + "/fast", rate=10.0, duration=1.0, connections=2, drain=30.0)
    text = format_report(report)
    for label in ("offered rate", "achieved rate", "errors", "p99.9", "client CPU"):
        assert label in text
    values = {v for body, _ in received.bodies for k, v in body.items() if k != "ts"}
    assert not any(isinstance(v, str) and v in text for v in values)


# --- the reference endpoint's round trip: the same commands as a scored event ------------------


def _scenario_plans(n: int) -> list[tuple[EventPlan, EventPlan]]:
    """(real plan, reference plan) of scenario events whose identifiers are all valid, so that
    both plans carry the same kinds (an invalid value gives fewer kinds in the real plan)."""
    events = generate(ScenarioParams(n_events=2_000, seed=4)).events
    config = ScoringConfig()
    planner = Planner(config, KeyHasher(b"loadgen-test-secret"))
    pairs = []
    for i in range(len(events)):
        event = event_at(events, i)
        real, ref = planner.plan(event), reference_plan(event, config)
        if [k for k, _ in real.identifiers] == [k for k, _ in ref.identifiers]:
            pairs.append((real, ref))
    return pairs[:n]


def test_reference_plan_has_the_shape_of_the_real_plan() -> None:
    """Same kinds, fan-out hit counts and amounts as `Planner.plan`, so the store's
    `WritePlanner` makes the same number of members per command for both."""
    pairs = _scenario_plans(1_500)
    assert len(pairs) >= 1_000  # nearly every scenario event has valid identifiers
    writes = WritePlanner(ScoringConfig())
    for real, ref in pairs:
        assert [len(h) for h in ref.hits] == [len(h) for h in real.hits]
        assert ref.amounts == real.amounts
        for a, b in zip(writes.event(real), writes.event(ref), strict=True):
            assert sorted(a.increments) == sorted(b.increments)
            assert (len(a.lowest), len(a.highest), a.stale) == (
                len(b.lowest),
                len(b.highest),
                b.stale,
            )


def test_scratch_keys_hold_no_raw_value() -> None:
    digest = scratch_digest("email", "rosa@example.test")
    key = scratch_key("email", digest)
    assert key.startswith("ref{e")
    assert "rosa" not in key
    assert len(digest) == 8


async def _command_calls(admin: Any) -> dict[str, int]:
    stats = await admin.info("commandstats")
    own = ("cmdstat_info", "cmdstat_config")  # this check's own calls (config|resetstat...)
    return {k: v["calls"] for k, v in stats.items() if not k.startswith(own)}


async def _compare_round_trips(url: str, pairs: list[tuple[EventPlan, EventPlan]]) -> None:
    settings = Settings(redis_url=url)
    store = await RedisStore.connect(settings, settings.scoring_config())
    admin = aioredis.Redis.from_url(url)
    try:
        await store.begin(pairs[0][0], read=True)  # the store's one-off first write is done
        for real, ref in pairs[1:]:
            await admin.config_resetstat()
            await store.begin(real, read=True)
            scored = await _command_calls(admin)
            await admin.config_resetstat()
            replies = await round_trip(store, ref, budget_s=5.0)
            assert await _command_calls(admin) == scored  # the scripts' own commands too
            # the client sent a claim and one EVALSHA per identifier (single server), or every
            # command itself (plain form)
            sent = {"cmdstat_set", "cmdstat_evalsha"} if store.exchange.scripted else set(scored)
            assert replies == sum(v for k, v in scored.items() if k in sent)
        async for key in admin.scan_iter(match="ref{*"):
            assert 0 < await admin.ttl(key) <= SCRATCH_TTL_S
    finally:
        await admin.aclose()
        await store.close()


@pytest.mark.redis
def test_reference_round_trip_sends_the_commands_of_a_scored_event(redis_url: str) -> None:
    """Counted by the server itself (INFO commandstats of a real redis-server): per command
    name, the reference round trip makes as many calls as `RedisStore.begin` for the same
    event, and its writes land on scratch keys that expire."""
    asyncio.run(_compare_round_trips(redis_url, _scenario_plans(40)))


def _app_with_reference(settings: Settings) -> FastAPI:
    """The service app, with the reference router added if the app does not include it yet."""
    app = create_app(settings)
    if not any(getattr(r, "path", "") == "/v1/reference" for r in app.routes):
        app.include_router(reference.router)
    return app


def _reference_body(event_id: str) -> dict[str, Any]:
    body = dict(scenario_events(1_000, seed=2)[0], account_id="acc_ref", email="r@example.test")
    return {"event_id": event_id, "ts": time.time(), **body}


@pytest.mark.redis
def test_reference_route_parses_like_score_and_answers(redis_url: str) -> None:
    settings = Settings(redis_url=redis_url, hash_secret=SecretStr("reference-route-test"))
    with TestClient(_app_with_reference(settings)) as client:
        answer = client.post("/v1/reference", json=_reference_body("ref-1"))
        assert answer.status_code == 200
        assert answer.json()["identifiers"] >= 3
        assert answer.json()["commands"] > answer.json()["identifiers"]
        refused = client.post("/v1/reference", json={"event_id": "ref-2", "ts": "yesterday"})
        assert refused.status_code == 422  # the same strict model as /v1/score


def test_reference_route_needs_redis() -> None:
    with TestClient(_app_with_reference(Settings(redis_url=None))) as client:
        answer = client.post("/v1/reference", json=_reference_body("ref-3"))
    assert answer.status_code == 503
    assert "Redis" in answer.json()["detail"]
