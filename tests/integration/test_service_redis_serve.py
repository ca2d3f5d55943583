"""``emberscore serve --workers 2`` on a real redis-server: one metrics view over both workers.

prometheus_client's multi-process mode (its documentation, "Multiprocess Mode") has every worker
write its values into one folder and ``/metrics`` add them up; so whichever worker answers a
scrape, the counts are those of the whole service.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from prometheus_client.mmap_dict import MmapedDict
from prometheus_client.parser import text_string_to_metric_families
from test_service_redis_support import SECRET, event

pytestmark = pytest.mark.redis
ROOT = Path(__file__).parents[2]
REQUESTS = 24


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _decisions(text: str) -> float:
    families = {f.name: f for f in text_string_to_metric_families(text)}
    return sum(
        s.value for s in families["emberscore_decisions"].samples if s.name.endswith("_total")
    )


def _wait_alive(url: str, process: subprocess.Popen[str]) -> None:
    for _ in range(300):
        if process.poll() is not None:
            raise AssertionError(f"serve exited with {process.returncode}")
        try:
            if httpx.get(url + "/readyz", timeout=0.5).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise AssertionError("serve did not become ready")


def test_two_workers_share_one_metrics_view(redis_url: str, tmp_path: Path) -> None:
    port, folder = _free_port(), tmp_path / "metrics"
    process = _serve(redis_url, port, folder)
    url = f"http://127.0.0.1:{port}"
    try:
        _wait_alive(url, process)
        for n in range(REQUESTS):  # a new connection each time, so both workers get some
            reply = httpx.post(url + "/v1/score", json=event(n), headers={"connection": "close"})
            assert reply.status_code == 200
        scrapes = [
            httpx.get(url + "/metrics", headers={"connection": "close"}).text for _ in range(6)
        ]
        writers = {f.stem.rsplit("_", 1)[-1] for f in folder.glob("*.db")}
    finally:
        process.send_signal(signal.SIGINT)
        output, _ = process.communicate(timeout=30)
    assert len(writers) >= 2, output  # both worker processes wrote into the shared folder
    assert all(_decisions(text) == REQUESTS for text in scrapes)
    assert "member1@quillpost.example" not in output
    assert process.returncode == 0


def _serve(redis_url: str, port: int, folder: Path) -> subprocess.Popen[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    env.update(
        {
            "EMBERSCORE_REDIS_URL": redis_url,
            "EMBERSCORE_HASH_SECRET": SECRET,
            "EMBERSCORE_METRICS_DIR": str(folder),
            "EMBERSCORE_SCORE_BUDGET_MS": "5000",
        }
    )
    return subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--workers", "2", "--port", str(port)],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )


def _answers_per_worker(folder: Path) -> dict[str, float]:
    """Score answers counted by each worker process (its own file in the metrics folder)."""
    counts: dict[str, float] = {}
    for path in folder.glob("counter_*.db"):
        total = 0.0
        for key, value, *_ in MmapedDict.read_all_values_from_file(str(path)):
            if key.startswith('["emberscore_decisions"'):
                total += value
        counts[path.stem.rsplit("_", 1)[-1]] = total
    return counts


CONNECTIONS = 48


def test_keep_alive_connections_spread_over_both_workers(redis_url: str, tmp_path: Path) -> None:
    """Each worker listens on a socket of its own (SO_REUSEPORT): the kernel spreads new
    connections over them by a hash of their addresses and ports (Linux socket(7)). 48
    connections opened at once, one request each: with a fair split each worker gets 24, and
    fewer than 9 on either side has a probability of about 3e-6 (binomial, n=48, p=1/2)."""
    port, folder = _free_port(), tmp_path / "metrics"
    process = _serve(redis_url, port, folder)
    url = f"http://127.0.0.1:{port}"
    try:
        _wait_alive(url, process)
        clients = [httpx.Client(base_url=url) for _ in range(CONNECTIONS)]
        try:
            for n, client in enumerate(clients):  # every connection opened before any closes
                assert client.post("/v1/score", json=event(100 + n)).status_code == 200
        finally:
            for client in clients:
                client.close()
    finally:
        process.send_signal(signal.SIGINT)
        output, _ = process.communicate(timeout=30)
    per_worker = _answers_per_worker(folder)
    assert sum(per_worker.values()) == CONNECTIONS, output
    assert len(per_worker) == 2
    assert min(per_worker.values()) >= 9, per_worker
    assert process.returncode == 0


def _post_until_answered(url: str, body: dict[str, object]) -> httpx.Response:
    """POST /v1/score on a new connection, again while nothing listens (for up to 30 s).

    A connection the kernel queued on the killed worker's socket just before it died is closed
    without an answer (``RemoteProtocolError``); nothing read it, and the event id makes a retry
    safe, so it is retried as a refused connection is.
    """
    deadline = time.monotonic() + 30
    while True:
        try:
            return httpx.post(url + "/v1/score", json=body, headers={"connection": "close"})
        except (httpx.ConnectError, httpx.RemoteProtocolError):
            if time.monotonic() > deadline:
                raise
            time.sleep(0.1)


def test_a_worker_that_dies_is_replaced(redis_url: str, tmp_path: Path) -> None:
    port, folder = _free_port(), tmp_path / "metrics"
    process = _serve(redis_url, port, folder)
    url = f"http://127.0.0.1:{port}"
    try:
        _wait_alive(url, process)
        workers = [int(p.stem.rsplit("_", 1)[-1]) for p in folder.glob("*.db")]
        victim = next(pid for pid in workers if pid != process.pid)
        os.kill(victim, signal.SIGKILL)
        # The other worker answers meanwhile, or, if it was still starting (ready means one
        # worker is), it or the replacement does within seconds: no request is lost for good.
        for n in range(20):
            assert _post_until_answered(url, event(200 + n)).status_code == 200
            time.sleep(0.1)
    finally:
        process.send_signal(signal.SIGTERM)
        output, _ = process.communicate(timeout=30)
    assert f"worker {victim} exited" in output
    assert process.returncode == 0
