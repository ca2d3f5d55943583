"""Open-loop load generator: POST events at a constant arrival rate and report latency honestly.

    .venv/bin/python -m loadtest.load --url http://127.0.0.1:8080/v1/score --rate 1000 --duration 60

Request ``i`` is *intended* to be sent at ``start + i / rate``, whatever happened to earlier
requests. Latency is measured from that intended time to the end of the answer, so time a request
spent waiting behind a slow server (for a free connection, or in the server's queue) is counted:
a slow server cannot hide its queueing by slowing the client down (coordinated omission).

A 2xx answer that says it was given without state (``"state_available":false``: the service
could not reach its store and failed open) counts as an error, not as a success.

Percentiles are exact: all latency samples of the 2xx answers are kept and sorted, and each
percentile is interpolated linearly between the two nearest ranks (the definition numpy uses by
default, method "linear"). The generator targets this machine only (127.0.0.1, ::1, localhost).
"""

from __future__ import annotations

import argparse
import asyncio
import math
import secrets
import sys
import time
from collections import Counter
from collections.abc import Coroutine
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

if __package__ in (None, ""):  # run as a script (python loadtest/load.py): find the package
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from loadtest.load_http import (
    Connection,
    LoadError,
    NonLocalTargetError,
    ProtocolError,
    Target,
    body_prefixes,
    full_request,
    parse_target,
    request_head,
    scenario_events,
)
from loadtest.load_schedule import (
    LatencySummary,
    intended_offset_s,
    percentile,
    request_count,
)

__all__ = [
    "CPU_WARN_SHARE",
    "DEGRADED_MARKER",
    "LatencySummary",
    "LoadConfig",
    "LoadError",
    "LoadReport",
    "NonLocalTargetError",
    "format_report",
    "intended_offset_s",
    "percentile",
    "prepare_bodies",
    "request_count",
    "run_async",
    "run_load",
]

T = TypeVar("T")
START_DELAY_S = 0.05  # the first intended send, after the pool is open
POOL_STAGGER_S = 0.002  # between connections of the pool (see `_open_pool`)
NOT_SENT = "not sent before the drain timeout"
NO_ANSWER = "no answer before the drain timeout"
CPU_WARN_SHARE = 0.9  # of one core: the client's event loop runs on one core
DEGRADED_MARKER = b'"state_available":false'
"""In a 2xx answer, marks a score given without state (fail open): counted as an error."""


@dataclass(frozen=True)
class LoadConfig:
    """One run: where, how fast, how long, over how many connections."""

    url: str
    rate_per_s: float
    duration_s: float
    connections: int = 64
    drain_s: float = 10.0
    late_ms: float = 5.0
    api_key: str | None = None
    degraded_marker: bytes | None = DEGRADED_MARKER

    def check(self) -> Target:
        """The parsed target, after refusing options that cannot work."""
        target = parse_target(self.url)
        if not (math.isfinite(self.rate_per_s) and self.rate_per_s > 0):
            raise LoadError(f"--rate must be positive requests/s, got {self.rate_per_s}")
        if not (math.isfinite(self.duration_s) and self.duration_s > 0):
            raise LoadError(f"--duration must be positive seconds, got {self.duration_s}")
        if self.connections < 1:
            raise LoadError(f"--connections must be at least 1, got {self.connections}")
        if self.drain_s < 0 or self.late_ms < 0:
            raise LoadError("--drain and --late-ms must be >= 0")
        return target


@dataclass(frozen=True)
class LoadReport:
    """What one run measured. Latencies count 2xx answers; errors count everything else,
    including 2xx answers that carry the degraded marker (a score given without state)."""

    target: str
    offered_rate_per_s: float
    duration_s: float
    connections: int
    scheduled: int
    sent: int
    ok: int
    errors: dict[str, int]
    elapsed_s: float
    latency: LatencySummary  # from the intended send time (open loop)
    service: LatencySummary  # from the actual send time (what a closed-loop client reports)
    queued: int  # requests that found every connection busy at their intended time
    late_sends: int  # sent more than late_ms after their intended time with a connection free
    late_ms: float
    max_client_lag_ms: float
    client_cpu_s: float

    @property
    def achieved_rate_per_s(self) -> float:
        return self.ok / self.elapsed_s if self.elapsed_s > 0 else 0.0

    @property
    def error_count(self) -> int:
        return sum(self.errors.values())

    @property
    def client_cpu_share(self) -> float:
        return self.client_cpu_s / self.elapsed_s if self.elapsed_s > 0 else 0.0

    @property
    def fell_behind(self) -> bool:
        """True when the client's own scheduler sent more than 1% of requests late."""
        return self.late_sends > max(1, 0.01 * self.sent)


@dataclass
class _Run:
    """Mutable state of one run, shared by the connection workers of one event loop."""

    config: LoadConfig
    target: Target
    prefixes: list[bytes]
    n: int
    head: bytes = b""
    start: float = 0.0
    wall_start: float = 0.0
    next_index: int = 0
    sent: int = 0
    answered: int = 0
    queued: int = 0
    late_sends: int = 0
    max_lag_s: float = 0.0
    last_end: float = 0.0
    latencies: list[float] = field(default_factory=list)
    service: list[float] = field(default_factory=list)
    errors: Counter[str] = field(default_factory=Counter)
    opened: list[Connection] = field(default_factory=list)

    async def worker(self, conn: Connection | None) -> None:
        """Take the next request, wait for its intended time, send it; until none are left."""
        late_s = self.config.late_ms / 1000.0
        rate = self.config.rate_per_s
        clock = time.perf_counter
        while self.next_index < self.n:
            i = self.next_index
            self.next_index += 1
            intended = self.start + intended_offset_s(i, rate)
            delay = intended - clock()
            if delay > 0:
                while delay > 0:  # a timer may fire a fraction of a millisecond early
                    await asyncio.sleep(delay)
                    delay = intended - clock()
                lag = clock() - intended
                self.max_lag_s = max(self.max_lag_s, lag)
                self.late_sends += lag > late_s
            else:
                self.queued += 1  # every connection was busy: the wait counts in latency
            conn = await self.send(conn, i, intended)

    async def send(self, conn: Connection | None, i: int, intended: float) -> Connection | None:
        """One request on ``conn`` (reopened if closed); the connection to use next."""
        data = full_request(self.head, self.prefixes[i], self.wall_start + (intended - self.start))
        sent = time.perf_counter()
        self.sent += 1
        try:
            if conn is None or conn.closed:
                conn = await Connection.open(self.target)
                self.opened.append(conn)
            status, body = await conn.exchange(data)
        except (OSError, EOFError, ProtocolError, ValueError) as exc:
            self.errors[type(exc).__name__] += 1
            self.answered += 1
            if conn is not None:
                conn.close()
            return None
        end = time.perf_counter()
        self.answered += 1
        marker = self.config.degraded_marker
        if marker is not None and 200 <= status < 300 and marker in body:
            self.errors[f"HTTP {status} with {marker.decode()}"] += 1
        elif 200 <= status < 300:
            self.latencies.append(end - intended)
            self.service.append(end - sent)
            self.last_end = end
        else:
            self.errors[f"HTTP {status}"] += 1
        return conn


async def _open_pool(target: Target, size: int) -> list[Connection]:
    """Open the pool one connection at a time, a little apart, as a proxy's pool fills.

    Opened all at once, the connections tend to land on one of the server's worker processes
    (they share one listening socket and the first to wake accepts the burst), and a run would
    then measure one worker instead of all of them.
    """
    pool: list[Connection] = []
    try:
        for _ in range(size):
            pool.append(await Connection.open(target))
            await asyncio.sleep(POOL_STAGGER_S)
    except OSError as exc:
        for conn in pool:
            conn.close()
        raise LoadError(f"cannot connect to {target.url}: {exc.strerror or exc}") from exc
    return pool


async def run_load(config: LoadConfig, prefixes: list[bytes]) -> LoadReport:
    """Run one open-loop load and report it; ``prefixes`` from `prepare_bodies`."""
    target = config.check()
    n = request_count(config.duration_s, config.rate_per_s)
    if len(prefixes) < n:
        raise LoadError(f"{n} requests scheduled but only {len(prefixes)} bodies prepared")
    run = _Run(config, target, prefixes, n, head=request_head(target, config.api_key))
    pool = await _open_pool(target, min(config.connections, max(n, 1)))
    run.opened += pool
    cpu_start = time.thread_time()
    run.start = time.perf_counter() + START_DELAY_S
    run.wall_start = time.time() + START_DELAY_S
    tasks = [asyncio.create_task(run.worker(conn)) for conn in pool]
    deadline = run.start + config.duration_s + config.drain_s
    _, pending = await asyncio.wait(tasks, timeout=max(0.0, deadline - time.perf_counter()))
    for task in pending:
        task.cancel()
    await asyncio.gather(*pending, return_exceptions=True)
    end = time.perf_counter()
    for conn in run.opened:
        conn.close()
    return _report(run, time.thread_time() - cpu_start, end)


def _report(run: _Run, cpu_s: float, end: float) -> LoadReport:
    errors = dict(run.errors)
    if run.n > run.sent:
        errors[NOT_SENT] = run.n - run.sent
    if run.sent > run.answered:
        errors[NO_ANSWER] = run.sent - run.answered
    finished = run.last_end if run.latencies else end
    c = run.config
    return LoadReport(
        target=run.target.url,
        offered_rate_per_s=c.rate_per_s,
        duration_s=c.duration_s,
        connections=c.connections,
        scheduled=run.n,
        sent=run.sent,
        ok=len(run.latencies),
        errors=errors,
        elapsed_s=max(finished - run.start, 1e-9),
        latency=LatencySummary.of(run.latencies),
        service=LatencySummary.of(run.service),
        queued=run.queued,
        late_sends=run.late_sends,
        late_ms=c.late_ms,
        max_client_lag_ms=run.max_lag_s * 1000.0,
        client_cpu_s=cpu_s,
    )


def prepare_bodies(
    n: int, seed: int = 7, distinct: int = 20_000, with_current_decision: bool = False
) -> list[bytes]:
    """``n`` request bodies (without their event time) from the demo scenario, fresh ids."""
    events = scenario_events(min(n, distinct), seed, with_current_decision)
    return body_prefixes(events, n, secrets.token_hex(4))


def format_report(r: LoadReport) -> str:
    """The report as aligned text lines (figures only, never a request body)."""
    errs = "; ".join(f"{k}: {v:,}" for k, v in sorted(r.errors.items())) or "none"
    lines = [
        f"target            {r.target} ({r.connections} connections)",
        f"offered rate      {r.offered_rate_per_s:10,.1f} req/s for {r.duration_s:g} s "
        f"({r.scheduled:,} scheduled, {r.sent:,} sent)",
        f"achieved rate     {r.achieved_rate_per_s:10,.1f} req/s "
        f"({r.ok:,} answered 2xx in {r.elapsed_s:.2f} s)",
        f"errors            {r.error_count:,} ({errs})",
        f"latency ms        {r.latency.line()}",
        "                  (from the intended send time, 2xx answers, exact sort of all samples)",
        f"service time ms   {r.service.line()}",
        "                  (from the actual send time: what a closed-loop client would report)",
        f"schedule          {r.queued:,} requests found all connections busy; "
        f"{r.late_sends:,} sent > {r.late_ms:g} ms late with a connection free "
        f"(max client lag {r.max_client_lag_ms:.1f} ms)",
        f"client CPU        {r.client_cpu_s:.2f} s in {r.elapsed_s:.2f} s "
        f"({100 * r.client_cpu_share:.0f}% of one core)",
    ]
    return "\n".join(lines + warnings(r))


def warnings(r: LoadReport) -> list[str]:
    """Warnings about the client itself (it fell behind, or used nearly a whole core)."""
    out = []
    if r.fell_behind:
        out.append(
            f"WARNING: the client fell behind its schedule: {r.late_sends:,} of {r.sent:,} "
            f"requests left more than {r.late_ms:g} ms after their intended time although a "
            "connection was free. Latencies include that lag: lower the rate or free a core."
        )
    if r.client_cpu_share > CPU_WARN_SHARE:
        out.append(
            f"WARNING: the client used {100 * r.client_cpu_share:.0f}% of one core; "
            "it may be the bottleneck rather than the server."
        )
    if r.queued and r.queued == r.sent and r.scheduled > r.connections:
        out.append("NOTE: every request queued for a connection: the server is far behind.")
    return out


def run_async(main: Coroutine[Any, Any, T], use_uvloop: bool = True) -> T:
    """Run a coroutine on a fresh event loop (uvloop when installed and wanted)."""
    factory = None
    if use_uvloop:
        try:
            import uvloop

            factory = uvloop.new_event_loop
        except ImportError:  # pragma: no cover - uvloop comes with uvicorn[standard]
            pass
    with asyncio.Runner(loop_factory=factory) as runner:
        return runner.run(main)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    p.add_argument("--url", default="http://127.0.0.1:8080/v1/score", help="loopback target")
    p.add_argument("--rate", type=float, default=1000.0, help="offered requests/s (default 1000)")
    p.add_argument("--duration", type=float, default=10.0, help="seconds of sending (default 10)")
    p.add_argument("--connections", type=int, default=64, help="keep-alive pool size (64)")
    p.add_argument("--drain", type=float, default=10.0, help="seconds to wait for answers after")
    p.add_argument("--late-ms", type=float, default=5.0, help="a send later than this is late")
    p.add_argument("--api-key", help="sent as X-API-Key when the service requires one")
    p.add_argument("--seed", type=int, default=7, help="demo scenario seed")
    p.add_argument("--distinct", type=int, default=20_000, help="distinct scenario events")
    p.add_argument("--shadow", action="store_true", help="send current_decision too")
    p.add_argument("--no-uvloop", action="store_true", help="use the standard asyncio loop")
    p.add_argument(
        "--degraded-marker",
        default=DEGRADED_MARKER.decode(),
        help="a 2xx answer containing this text is an error ('' to count none)",
    )
    return p


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    config = LoadConfig(
        args.url,
        args.rate,
        args.duration,
        args.connections,
        args.drain,
        args.late_ms,
        args.api_key,
        args.degraded_marker.encode() or None,
    )
    try:
        config.check()
        n = request_count(args.duration, args.rate)
        prefixes = prepare_bodies(n, args.seed, args.distinct, args.shadow)
        report = run_async(run_load(config, prefixes), use_uvloop=not args.no_uvloop)
    except LoadError as exc:
        print(f"load: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("load: interrupted", file=sys.stderr)
        return 130
    print(format_report(report))
    return 0


if __name__ == "__main__":
    sys.exit(main())
