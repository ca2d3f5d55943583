"""Prometheus metrics of the HTTP service, and the middleware that times every request.

Each application holds its own `Metrics` (its own registry), so that two apps in one process (in
tests, say) do not share counts. When uvicorn runs several worker processes, `serve` points
``PROMETHEUS_MULTIPROC_DIR`` (and ``EMBERSCORE_METRICS_DIR``) at one empty folder before the
workers start: every worker then writes its values there and ``/metrics`` adds up all workers
(prometheus_client's multi-process mode).

Requests are labelled by their route *template* (``/v1/reputation/{kind}/{value:path}``), never
by the raw path, which may hold an identifier value; the access log written here follows the same
rule (uvicorn's own access log, which prints raw paths, is switched off by `serve`).
"""

from __future__ import annotations

import logging
import os
import time
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
    multiprocess,
    values,
)
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from scoring.config import DAY_S

LATENCY_BUCKETS_S = (
    0.0005,
    0.001,
    0.0025,
    0.005,
    0.01,
    0.025,
    0.05,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
)
LABEL_LAG_BUCKETS_S = tuple(
    d * DAY_S for d in (1 / 24, 0.25, 1, 2, 3, 7, 14, 21, 30, 45, 60, 90, 120)
)
UNMATCHED_ROUTE = "unmatched"
CONTENT_TYPE = CONTENT_TYPE_LATEST

access_log = logging.getLogger("emberscore.access")


class Metrics:
    """Every metric the service exports, in one registry.

    Parameters
    ----------
    multiprocess_dir
        The folder shared by all worker processes (prometheus_client's multi-process mode), or
        None for a single process.

    Examples
    --------
    >>> m = Metrics()
    >>> m.decisions.labels("allow").inc()
    >>> b"emberscore_decisions_total" in m.exposition()
    True
    """

    def __init__(self, multiprocess_dir: str | None = None) -> None:
        if multiprocess_dir is not None and values.ValueClass is values.MutexValue:
            # prometheus_client chose single-process values when it was imported (no
            # PROMETHEUS_MULTIPROC_DIR then): reading the folder would show nothing.
            logging.getLogger("emberscore.service").warning(
                "metrics folder ignored: PROMETHEUS_MULTIPROC_DIR was not set at start "
                "(`emberscore serve` sets it for several workers)"
            )
            multiprocess_dir = None
        self.multiprocess_dir = multiprocess_dir
        r = self.registry = CollectorRegistry()
        self.latency = Histogram(
            "emberscore_request_duration_seconds",
            "Time to answer a request, by route template, method and status",
            ["route", "method", "status"],
            buckets=LATENCY_BUCKETS_S,
            registry=r,
        )
        self.decisions = Counter(
            "emberscore_decisions", "Score answers by decision", ["decision"], registry=r
        )
        self.store_errors = Counter(
            "emberscore_store_errors",
            "Store calls that failed or ran out of time, by operation and cause",
            ["operation", "cause"],
            registry=r,
        )
        self.fail_open = Counter(
            "emberscore_fail_open_answers",
            "Score answers given without state (prior only) because the store failed",
            registry=r,
        )
        self.model_version = Gauge(
            "emberscore_model_version",
            "Version of the model snapshot in use",
            registry=r,
            multiprocess_mode="livemax",
        )
        self.labels = Counter(
            "emberscore_labels",
            "Labels applied, by outcome (applied, changed, duplicate, unknown_event)",
            ["outcome"],
            registry=r,
        )
        self.write_behind = Gauge(
            "emberscore_store_write_behind",
            "Writes behind the request path: written, dropped, failed (totals), queued (now)",
            ["state"],
            registry=r,
            multiprocess_mode="livesum",
        )
        self.label_lag = Histogram(
            "emberscore_label_lag_seconds",
            "Seconds between an event and the arrival of its label (labeled_at - ts)",
            buckets=LABEL_LAG_BUCKETS_S,
            registry=r,
        )

        self._decision_counts: dict[str, Any] = {}
        self._latency_of: dict[tuple[str, str, int], Any] = {}
        self._version_seen: int | None = None

    def answered(self, decision: str, model_version: int) -> None:
        """Count one score answer, and keep the model-version gauge current (written only when
        the version changes: in multi-process mode each write goes to a shared file)."""
        counter = self._decision_counts.get(decision)
        if counter is None:
            counter = self._decision_counts[decision] = self.decisions.labels(decision)
        counter.inc()
        if model_version != self._version_seen:
            self._version_seen = model_version
            self.model_version.set(model_version)

    def observe_request(self, route: str, method: str, status: int, elapsed_s: float) -> None:
        """Time one request (the labelled child is looked up once per route, method, status)."""
        key = (route, method, status)
        child = self._latency_of.get(key)
        if child is None:
            child = self._latency_of[key] = self.latency.labels(route, method, str(status))
        child.observe(elapsed_s)

    def finish_request(self, route: str, method: str, status: int, elapsed_s: float) -> None:
        """Time one request and write its access-log line (by route template, never raw path)."""
        self.observe_request(route, method, status, elapsed_s)
        access_log.info("%s %s %d %.1f ms", method, route, status, elapsed_s * 1000)

    def exposition(self) -> bytes:
        """The Prometheus text format of every metric (of every worker in multi-process mode)."""
        if self.multiprocess_dir is None:
            return generate_latest(self.registry)
        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry, path=self.multiprocess_dir)  # type: ignore[no-untyped-call]
        return generate_latest(registry)

    def store_error(self, operation: str, exc: BaseException) -> None:
        cause = "timeout" if isinstance(exc, TimeoutError) else "unavailable"
        self.store_errors.labels(operation, cause).inc()

    def process_exit(self) -> None:
        """Forget this process's live gauges (multi-process mode) when it stops."""
        if self.multiprocess_dir is not None:
            multiprocess.mark_process_dead(os.getpid(), self.multiprocess_dir)  # type: ignore[no-untyped-call]


class RequestMetrics:
    """ASGI middleware: time every HTTP request and write one access-log line without raw paths."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500

        async def send_and_note(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_and_note)
        finally:
            route = getattr(scope.get("route"), "path", UNMATCHED_ROUTE)
            method = scope.get("method", "")
            self.metrics.finish_request(route, method, status, time.perf_counter() - start)
