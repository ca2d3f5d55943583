"""``emberscore serve`` and the logs: no raw identifier value ever reaches a log line.

Two checks: the application's own logs captured in-process during every kind of request
(accepted, refused, failing store, erasure), and a real ``emberscore serve`` (uvicorn in a
subprocess) whose whole output is searched after requests that carry raw values.
"""

from __future__ import annotations

import logging
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from urllib.parse import quote

import httpx
import pytest
from test_api_support import SECRET, event, inject, running, unavailable

from service.cli import main
from service.config import Settings
from service.metrics import Metrics
from service.workers.serve import listening_socket, prepare_metrics_dir, server_options

pytestmark = pytest.mark.anyio
ROOT = Path(__file__).parents[2]

RAW = {
    "account_id": "acct-raw-5501",
    "ip": "11.22.77.99",
    "device_id": "dev-raw-5502",
    "phone": "+44 20 7946 0555",
    "email": "raw.person.5503@quillpost.example",
}
"""Invented raw identifier values; none may appear in any log line."""
NEEDLES = [*RAW.values(), "7946 0555", "442079460555", "raw.person.5503"]


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


async def _every_kind_of_request(client: httpx.AsyncClient) -> None:
    body = event(1, **RAW)
    await client.post("/v1/score", json=body)
    await client.post("/v1/score", json=body)  # a retry
    await client.post("/v1/score", json={**body, "ts": RAW["email"]})  # refused: bad time
    await client.post("/v1/score", json={**body, "event_id": "ev-x", "email": 5})
    await client.post("/v1/events", json={"events": [event(2, **RAW)]})
    labels = [{"event_id": "ev-1", "labeled_at": 4e9, "is_fraud": True}]
    await client.post("/v1/labels", json={"labels": labels})
    for kind, field in (
        ("email", "email"),
        ("phone", "phone"),
        ("ip", "ip"),
        ("device", "device_id"),
    ):
        await client.get(f"/v1/reputation/{kind}/{quote(RAW[field], safe='')}")
    await client.delete(f"/v1/reputation/email/{quote(RAW['email'], safe='')}")
    await client.get(f"/v1/reputation/ip/{quote(RAW['email'], safe='')}")  # refused: not an ip


async def test_application_logs_hold_no_raw_values(caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.DEBUG):
        async with running() as (client, app):
            await _every_kind_of_request(client)
            inject(app, {"begin": unavailable, "profile": unavailable})
            await _every_kind_of_request(client)  # store failing: warnings are logged
    server_side = [r for r in caplog.records if not r.name.startswith(("httpx", "httpcore"))]
    assert any(r.name == "emberscore.access" for r in server_side)
    assert any("fail open" in r.getMessage() for r in server_side)
    text = "\n".join(r.getMessage() for r in server_side)
    for needle in NEEDLES:
        assert needle not in text


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_alive(url: str, process: subprocess.Popen[str]) -> None:
    for _ in range(200):
        if process.poll() is not None:
            raise AssertionError(f"serve exited with {process.returncode}")
        try:
            if httpx.get(url + "/healthz", timeout=0.5).status_code == 200:
                return
        except httpx.HTTPError:
            time.sleep(0.1)
    raise AssertionError("serve did not come up")


def test_real_serve_output_holds_no_raw_values() -> None:
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
    env.update({"EMBERSCORE_HASH_SECRET": SECRET, "EMBERSCORE_PORT": str(port)})
    process = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve"],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        _wait_alive(url, process)
        with httpx.Client(base_url=url, timeout=5.0) as client:
            score = client.post("/v1/score", json=event(1, **RAW))
            path = f"/v1/reputation/email/{quote(RAW['email'], safe='')}"
            reputation = client.get(path)
            refused = client.post("/v1/score", json={**event(2, **RAW), "ts": RAW["phone"]})
    finally:
        process.send_signal(signal.SIGINT)
        output, _ = process.communicate(timeout=20)
    assert score.status_code == 200
    assert reputation.status_code == 200
    assert refused.status_code == 422
    assert "embedded store, for trying out only" in output
    assert "POST /v1/score 200" in output  # the application's access log, with templates
    assert "GET /v1/reputation/{kind}/{value:path} 200" in output
    for needle in NEEDLES:
        assert needle not in output
    assert process.returncode == 0


def _clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """No EMBERSCORE_* settings; the variables `serve` sets are put back after the test."""
    for name in {*os.environ, "PROMETHEUS_MULTIPROC_DIR", "EMBERSCORE_METRICS_DIR"}:
        if name.startswith("EMBERSCORE_") or name == "PROMETHEUS_MULTIPROC_DIR":
            monkeypatch.setenv(name, "")
            monkeypatch.delenv(name)


def test_serve_refuses_several_workers_without_redis(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _clean_env(monkeypatch)
    assert main(["serve", "--workers", "2"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("emberscore serve: error: --workers 2 needs EMBERSCORE_REDIS_URL")
    assert "Traceback" not in err


def test_serve_refuses_production_with_trial_settings(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _clean_env(monkeypatch)
    monkeypatch.setenv("EMBERSCORE_MODE", "production")
    assert main(["serve"]) == 2
    err = capsys.readouterr().err
    assert "production mode refuses to start" in err
    assert len(err.strip().splitlines()) == 1


def test_server_options() -> None:
    options = server_options("0.0.0.0", 8080, 2)
    assert options["factory"] is True
    assert options["access_log"] is False  # uvicorn's access log prints raw paths
    assert options["loop"] == "uvloop"  # installed with uvicorn[standard]
    assert options["http"] == "httptools"


def test_metrics_folder_is_emptied_and_shared(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    _clean_env(monkeypatch)
    folder = tmp_path / "metrics"
    folder.mkdir()
    (folder / "counter_123.db").write_bytes(b"stale")
    made = prepare_metrics_dir(Settings(_env_file=None, metrics_dir=str(folder)), workers=2)  # type: ignore[call-arg]
    assert made is None
    assert list(folder.iterdir()) == []
    assert os.environ["PROMETHEUS_MULTIPROC_DIR"] == str(folder)
    assert os.environ["EMBERSCORE_METRICS_DIR"] == str(folder)
    fresh = Settings(_env_file=None, metrics_dir=None)  # type: ignore[call-arg]
    made = prepare_metrics_dir(fresh, workers=3)
    assert made is not None
    assert os.environ["PROMETHEUS_MULTIPROC_DIR"] == str(made)
    made.rmdir()


def test_a_metrics_folder_without_multiprocess_values_is_ignored(tmp_path: Path) -> None:
    """In a process where prometheus_client started without PROMETHEUS_MULTIPROC_DIR (as this
    test process did), the folder is ignored rather than read empty."""
    metrics = Metrics(str(tmp_path))
    metrics.decisions.labels("deny").inc()
    assert metrics.multiprocess_dir is None
    assert b'emberscore_decisions_total{decision="deny"} 1.0' in metrics.exposition()


def test_workers_bind_the_same_port_each_with_a_socket_of_its_own() -> None:
    """SO_REUSEPORT (Linux socket(7)): several sockets bound to one address and port."""
    first = listening_socket("127.0.0.1", 0)
    try:
        port = first.getsockname()[1]
        second = listening_socket("127.0.0.1", port)
        second.close()
    finally:
        first.close()


def test_workers_that_cannot_listen_stop_the_service() -> None:
    """A port held by a socket without SO_REUSEPORT: no worker can start, serve exits 1."""
    with socket.socket() as holder:
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        port = holder.getsockname()[1]
        env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
        env.pop("PROMETHEUS_MULTIPROC_DIR", None)
        env.update(
            {"EMBERSCORE_HASH_SECRET": SECRET, "EMBERSCORE_REDIS_URL": "redis://127.0.0.1:1/0"}
        )
        done = subprocess.run(
            [sys.executable, "-m", "service.cli", "serve", "--workers", "2", "--port", str(port)],
            cwd=ROOT,
            env=env,
            capture_output=True,
            text=True,
            timeout=60,
        )
    assert done.returncode == 1
    assert "could not start: stopping" in done.stderr
    assert "Traceback" not in done.stderr
