"""Shared test settings, and real Redis servers for the integration tests.

Hypothesis runs derandomized (the same examples on every run), so CI is stable; set
``HYPOTHESIS_PROFILE=explore`` locally to search with fresh random examples. No deadline: tests
never assert wall-clock times.

Redis: the session starts its own ``redis-server`` processes on free loopback ports (one single
server, and a three-master cluster for the cluster test), waits for PING, flushes them between
tests, and stops them by their own process ids at the end. No other Redis is ever touched (in
particular not one on the default port). Without the ``redis-server`` binary, the tests that need
it are skipped with the reason.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import redis
from hypothesis import settings

from scoring.fusion import Fusion
from scoring.hashing import KeyHasher
from service.config import Settings
from service.engine import Engine
from service.scenario import Scenario, ScenarioParams, generate
from service.stores.memory import MemoryStore
from service.workers.learner import Learner

settings.register_profile("deterministic", derandomize=True, deadline=None)
settings.register_profile("explore", derandomize=False, deadline=None, max_examples=1000)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "deterministic"))

MISSING_REDIS = (
    "redis-server not found on PATH: install it (Debian: apt-get install redis-server) "
    "to run the Redis integration tests"
)
READY_TIMEOUT_S = 20.0
CLUSTER_TIMEOUT_S = 90.0


def free_port(cluster: bool = False) -> int:
    """A loopback port nobody listens on (for a cluster node, its bus port +10000 as well)."""
    for _ in range(200):
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = int(s.getsockname()[1])
        if not cluster:
            return port
        if port + 10000 > 65535:
            continue
        with socket.socket() as bus:
            try:
                bus.bind(("127.0.0.1", port + 10000))
            except OSError:
                continue
        return port
    raise RuntimeError("no free loopback port found")


class RedisServer:
    """One ``redis-server`` process that this test session started (never another one)."""

    def __init__(self, directory: Path, cluster: bool = False) -> None:
        self.directory = directory
        self.cluster = cluster
        self.port = free_port(cluster)
        self.process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def command(self) -> list[str]:
        args = [
            shutil.which("redis-server") or "redis-server",
            "--port", str(self.port),
            "--bind", "127.0.0.1",
            "--save", "",
            "--appendonly", "no",
            "--dir", str(self.directory),
            "--logfile", str(self.directory / "redis.log"),
        ]  # fmt: skip
        if self.cluster:
            args += ["--cluster-enabled", "yes", "--cluster-config-file", "nodes.conf"]
        return args

    def start(self) -> None:
        self.directory.mkdir(parents=True, exist_ok=True)
        self.process = subprocess.Popen(self.command(), stdout=subprocess.DEVNULL)
        self.wait_ready()

    def wait_ready(self) -> None:
        deadline = time.monotonic() + READY_TIMEOUT_S
        while True:
            try:
                if self.client().ping():
                    return
            except redis.ConnectionError:
                pass
            if self.process is not None and self.process.poll() is not None:
                raise RuntimeError(f"redis-server exited; see {self.directory / 'redis.log'}")
            if time.monotonic() > deadline:
                raise RuntimeError(f"redis-server on port {self.port} did not answer PING")
            time.sleep(0.05)

    def client(self) -> redis.Redis:
        return redis.Redis(port=self.port, socket_timeout=5.0)

    def flush(self) -> None:
        with self.client() as c:
            c.flushall()

    def stop(self) -> None:
        """Stop this server by its own process id (SIGTERM, then SIGKILL if it lingers)."""
        if self.process is None:
            return
        self.process.terminate()
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait(timeout=10)
        self.process = None


def _require_redis() -> None:
    if shutil.which("redis-server") is None:
        pytest.skip(MISSING_REDIS)


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RedisServer]:
    """One redis-server for the session."""
    _require_redis()
    server = RedisServer(tmp_path_factory.mktemp("redis"))
    server.start()
    yield server
    server.stop()


@pytest.fixture
def redis_url(redis_server: RedisServer) -> str:
    """URL of the session's redis-server, flushed for this test."""
    redis_server.flush()
    return redis_server.url


@pytest.fixture
def own_redis(tmp_path: Path) -> Iterator[RedisServer]:
    """A redis-server for this test alone (it may stop and start it); stopped afterwards."""
    _require_redis()
    server = RedisServer(tmp_path / "redis")
    server.start()
    yield server
    server.stop()


def _cluster_ok(c: redis.Redis) -> bool:
    info: Any = c.cluster("INFO")  # parsed into a dict by the client, raw text otherwise
    if isinstance(info, dict):
        return info.get("cluster_state") in ("ok", b"ok")
    return b"cluster_state:ok" in info


def _create_cluster(nodes: list[RedisServer]) -> None:
    addresses = [f"127.0.0.1:{n.port}" for n in nodes]
    cli = shutil.which("redis-cli")
    if cli is None:
        pytest.skip("redis-cli not found on PATH: it is needed to create the test cluster")
    subprocess.run(
        [cli, "--cluster", "create", *addresses, "--cluster-yes"],
        check=True,
        stdout=subprocess.DEVNULL,
        timeout=60,
    )
    deadline = time.monotonic() + CLUSTER_TIMEOUT_S
    for node in nodes:
        with node.client() as c:
            while not _cluster_ok(c):
                if time.monotonic() > deadline:
                    raise RuntimeError("the test cluster did not reach cluster_state:ok")
                time.sleep(0.1)


@pytest.fixture(scope="session")
def redis_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[list[RedisServer]]:
    """A three-master Redis Cluster (no replicas) for the session."""
    _require_redis()
    base = tmp_path_factory.mktemp("redis-cluster")
    nodes = [RedisServer(base / f"node{i}", cluster=True) for i in range(3)]
    try:
        for node in nodes:
            node.start()
        _create_cluster(nodes)
        yield nodes
    finally:
        for node in nodes:
            node.stop()


@pytest.fixture
def redis_cluster_url(redis_cluster: list[RedisServer]) -> str:
    """URL of one node of the session's cluster, every node flushed for this test."""
    for node in redis_cluster:
        node.flush()
    return redis_cluster[0].url


class ReplayKit:
    """Builds scenario streams, settings and engines the same way for every Redis test."""

    secret = b"emberscore-integration-test-secret"

    @staticmethod
    def world(n_events: int, seed: int) -> Scenario:
        """A generated three-week stream (invented data) with its labels."""
        return generate(
            ScenarioParams(n_events=n_events, days=21, seed=seed, promo_day=12, campus_wave_day=6)
        )

    @staticmethod
    def settings(url: str | None, **overrides: Any) -> Settings:
        """Settings for a test; the scoring budget is generous so a busy machine never fails a
        test by timing out (the failure test sets its own)."""
        values: dict[str, Any] = {"redis_url": url, "score_budget_ms": 5000.0, **overrides}
        return Settings(**values)

    def engine(self, store: Any, settings: Settings) -> Engine:
        """An engine with an in-process learner over ``store``."""
        config = settings.scoring_config()
        fusion = Fusion(config)
        learner = Learner(store, config, fusion)
        return Engine(store, config, KeyHasher(self.secret), fusion, learner)

    @staticmethod
    def memory_store(settings: Settings) -> MemoryStore:
        return MemoryStore(
            settings.scoring_config(), settings.idempotency_ttl_s, settings.label_horizon_s
        )


@pytest.fixture(scope="session")
def kit() -> ReplayKit:
    return ReplayKit()
