"""``emberscore serve``: the HTTP service under uvicorn.

Settings come from the ``EMBERSCORE_*`` environment and are checked first
(`Settings.check_production`). Without a Redis URL the service runs one process on the embedded
store, for trying out. With Redis it may run several worker processes; they then share one
folder for Prometheus metrics (prometheus_client's multi-process mode), emptied at start.

uvicorn's own access log prints raw request paths, which may hold identifier values
(``/v1/reputation/email/...``), so it is off; the application writes its own access log with route
templates instead (`service.metrics.RequestMetrics`).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Any

import uvicorn

from service.config import Settings, SettingsError

APP_FACTORY = "service.app:app_from_environment"
GRACEFUL_SHUTDOWN_S = 10


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
        uvicorn.run(APP_FACTORY, **server_options(host, port, workers))
    finally:
        if made is not None:
            shutil.rmtree(made, ignore_errors=True)
    return 0
