"""``emberscore serve``: the HTTP service under uvicorn.

Settings come from the ``EMBERSCORE_*`` environment and are checked first
(`Settings.check_production`). Without a Redis URL the service runs one process on the embedded
store, for trying out. With Redis it may run several worker processes; they then share one
folder for Prometheus metrics (prometheus_client's multi-process mode), emptied at start.

uvicorn's own access log prints raw request paths, which may hold identifier values
(``/v1/reputation/email/...``), so it is off; the application writes its own access log with route
templates instead (`service.metrics.RequestMetrics`).

Several workers each listen on a socket of their own, all bound to the same address with
``SO_REUSEPORT`` (Linux ``socket(7)``): the kernel spreads incoming connections over them by a
hash of each connection's addresses and ports. With uvicorn's own supervisor the workers share
one listening socket and whichever is awake first takes a burst of connections (measured: 57/7
of 64 keep-alive connections), so one worker did most of the work while the other idled. Here
the parent process only starts the workers, restarts one that dies, and passes a stop on
(`Workers`); where ``SO_REUSEPORT`` is missing, uvicorn's supervisor runs them as before.
"""

from __future__ import annotations

import importlib.util
import multiprocessing
import os
import shutil
import signal
import socket
import sys
import tempfile
import time
from multiprocessing.connection import wait
from multiprocessing.process import BaseProcess
from pathlib import Path
from typing import Any

import uvicorn

from service.config import Settings, SettingsError

APP_FACTORY = "service.app:app_from_environment"
GRACEFUL_SHUTDOWN_S = 10
STARTUP_FAILURE = 3
"""uvicorn's exit status for a server that could not start (app, settings or socket)."""
RESTART_PAUSE_S = 1.0


def log_config() -> dict[str, Any]:
    """uvicorn's logging setup, plus the application's loggers (through the root logger)."""
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {
            "default": {
                "()": "uvicorn.logging.DefaultFormatter",
                "fmt": "%(levelprefix)s %(name)s: %(message)s",
                "use_colors": None,
            },
        },
        "handlers": {
            "default": {
                "formatter": "default",
                "class": "logging.StreamHandler",
                "stream": "ext://sys.stderr",
            },
        },
        "loggers": {
            "uvicorn": {"handlers": ["default"], "level": "INFO", "propagate": False},
            "uvicorn.error": {"level": "INFO"},
            "uvicorn.access": {"level": "WARNING"},
        },
        "root": {"handlers": ["default"], "level": "INFO"},
    }


def _installed(module: str) -> bool:
    return importlib.util.find_spec(module) is not None


def server_options(host: str, port: int, workers: int) -> dict[str, Any]:
    """Keyword arguments of `uvicorn.run` for the service (uvloop and httptools when present)."""
    return {
        "host": host,
        "port": port,
        "workers": workers,
        "factory": True,
        "loop": "uvloop" if _installed("uvloop") else "asyncio",
        "http": "httptools" if _installed("httptools") else "h11",
        "lifespan": "on",
        "access_log": False,
        "log_config": log_config(),
        "server_header": False,
        # Client addresses are neither used nor logged: no proxy headers to interpret.
        "proxy_headers": False,
        "timeout_graceful_shutdown": GRACEFUL_SHUTDOWN_S,
    }


def _check_workers(settings: Settings, workers: int) -> None:
    if workers < 1:
        raise SettingsError(f"--workers must be at least 1, got {workers}")
    if workers > 1 and settings.redis_url is None:
        raise SettingsError(
            f"--workers {workers} needs EMBERSCORE_REDIS_URL: the embedded store lives in one "
            "process, so it runs one worker only"
        )


def prepare_metrics_dir(settings: Settings, workers: int) -> Path | None:
    """Point every worker at one emptied metrics folder; returns a folder made here, if any.

    One worker needs no folder: its metrics live in its own memory.
    """
    if workers == 1:
        return None
    made = None
    if settings.metrics_dir is None:
        made = Path(tempfile.mkdtemp(prefix="emberscore-metrics-"))
        folder = made
    else:
        folder = Path(settings.metrics_dir)
        folder.mkdir(parents=True, exist_ok=True)
    for stale in folder.glob("*.db"):  # values of an earlier run would be added in
        stale.unlink()
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = str(folder)
    os.environ["EMBERSCORE_METRICS_DIR"] = str(folder)
    return made


def _say(text: str) -> None:
    print(f"emberscore serve: {text}", file=sys.stderr, flush=True)


def serve(host: str | None, port: int | None, workers: int | None) -> int:
    """Run the service until interrupted; returns the exit status."""
    from service.app import check_settings

    settings = Settings()
    check_settings(settings)
    host = host or settings.host
    port = port or settings.port
    workers = workers or settings.workers
    _check_workers(settings, workers)
    if settings.redis_url is None:
        _say("no EMBERSCORE_REDIS_URL: one process on the embedded store, for trying out only")
    if not settings.api_keys:
        _say("no EMBERSCORE_API_KEYS: development mode, requests need no API key")
    made = prepare_metrics_dir(settings, workers)
    try:
        if workers > 1 and hasattr(socket, "SO_REUSEPORT"):
            return Workers(host, port, workers).run()
        uvicorn.run(APP_FACTORY, **server_options(host, port, workers))
    finally:
        if made is not None:
            shutil.rmtree(made, ignore_errors=True)
    return 0


def listening_socket(host: str, port: int) -> socket.socket:
    """A socket bound to ``host:port`` with ``SO_REUSEPORT``, for one worker (not listening yet:
    the server starts listening when it starts)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    sock.bind((host, port))
    return sock


def run_worker(host: str, port: int) -> None:
    """One worker process: its own socket, uvicorn on it (stops on SIGINT or SIGTERM)."""
    try:
        sock = listening_socket(host, port)
    except OSError as exc:
        print(f"emberscore serve: cannot listen on {host}:{port}: {exc}", file=sys.stderr)
        sys.exit(STARTUP_FAILURE)
    options = server_options(host, port, 1)
    del options["workers"]
    server = uvicorn.Server(uvicorn.Config(APP_FACTORY, **options))
    server.run(sockets=[sock])
    if not server.started:
        sys.exit(STARTUP_FAILURE)


class Workers:
    """Starts ``count`` worker processes, restarts one that dies, stops them all on a signal.

    A worker that exits with uvicorn's startup-failure status stops the service (the same cause
    would stop every replacement); the exit status is then 1.
    """

    def __init__(self, host: str, port: int, count: int) -> None:
        self.host = host
        self.port = port
        self.count = count
        self._context = multiprocessing.get_context("spawn")
        self._processes: list[BaseProcess] = []
        self._stopping = False

    def run(self) -> int:
        previous = {sig: signal.signal(sig, self._stop) for sig in (signal.SIGINT, signal.SIGTERM)}
        _say(f"{self.count} workers on http://{self.host}:{self.port} (a socket each)")
        try:
            self._processes = [self._start() for _ in range(self.count)]
            status = self._watch()
        finally:
            self._stop_all()
            for sig, handler in previous.items():
                signal.signal(sig, handler)
        return status

    def _start(self) -> BaseProcess:
        process = self._context.Process(target=run_worker, args=(self.host, self.port))
        process.start()
        return process

    def _stop(self, signum: int, frame: Any) -> None:
        self._stopping = True

    def _watch(self) -> int:
        while not self._stopping:
            wait([p.sentinel for p in self._processes], timeout=0.5)
            for i, process in enumerate(self._processes):
                if process.exitcode is None or self._stopping:
                    continue
                _forget(process.pid)
                if process.exitcode == STARTUP_FAILURE:
                    _say(f"worker {process.pid} could not start: stopping")
                    return 1
                _say(f"worker {process.pid} exited with {process.exitcode}: starting another")
                time.sleep(RESTART_PAUSE_S)
                self._processes[i] = self._start()
        return 0

    def _stop_all(self) -> None:
        for process in self._processes:
            if process.exitcode is None and process.pid is not None:
                os.kill(process.pid, signal.SIGTERM)
        deadline = time.monotonic() + GRACEFUL_SHUTDOWN_S + 5
        for process in self._processes:
            process.join(max(0.0, deadline - time.monotonic()))
            if process.exitcode is None:
                process.kill()
                process.join()


def _forget(pid: int | None) -> None:
    """Drop a dead worker's live gauges from the shared metrics folder (multi-process mode)."""
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if folder and pid is not None:
        from prometheus_client import multiprocess

        multiprocess.mark_process_dead(pid, folder)  # type: ignore[no-untyped-call]
