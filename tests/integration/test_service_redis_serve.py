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
    process = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--workers", "2", "--port", str(port)],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
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
