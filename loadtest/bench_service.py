"""Benchmark the HTTP service over Redis on this machine and print the figures (nothing asserts).

    .venv/bin/python -m loadtest.bench_service                      # the full run: several minutes
    .venv/bin/python -m loadtest.bench_service --duration 10 --step-duration 5   # a quick look

Starts its own ``redis-server`` on a free loopback port and ``emberscore serve`` with two workers
against it (a fresh hashing secret, the reference endpoint on), warms up, then:

1. offers ``--rate`` requests/s (default 1,000) to ``POST /v1/score`` for ``--duration`` seconds
   (default 60) and prints the achieved rate, latency percentiles and errors;
2. finds the saturation throughput of ``/v1/score`` and of ``/v1/reference`` (the same body and
   one Redis round trip of the same size, no scoring): the offered rate goes up by
   ``--step-factor`` per step from ``--start-rate`` (down, if that first step already fails)
   until a step fails, then is refined by bisection, and the highest rate *sustained*
   is reported: no errors (a score without state counts as one), at least 97% of it achieved,
   p99 at most ``--p99-bound-ms`` (default 50, the default scoring budget), and the client using
   less than 90% of a core. Both, and their ratio, are printed.

Load comes from `loadtest.load` (open loop, latency from the intended send time). Everything
runs on the same machine, so the client, Redis and the service share its cores: the figures are
for this machine as a whole. Both processes are stopped by their own process ids at the end.
"""

from __future__ import annotations

import argparse
import os
import secrets
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

if __package__ in (None, ""):  # run as a script (python loadtest/bench_service.py)
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from loadtest.bench_processes import (
    BenchError,
    RedisProcess,
    ServiceProcess,
    load_average,
    machine_jiffies,
    steal_share,
)
from loadtest.load import (
    CPU_WARN_SHARE,
    LoadConfig,
    LoadError,
    LoadReport,
    format_report,
    request_count,
    run_async,
    run_load,
)
from loadtest.load_http import body_prefixes, scenario_events

ACHIEVED_SHARE = 0.97
MIN_RATE = 10.0  # the search gives up below this rate
QUIET_CPU_S = 0.1  # CPU seconds in one second of wall time: the service counts as idle


@dataclass(frozen=True)
class Measured:
    """One load run with the CPU the service and Redis used during it."""

    report: LoadReport
    process_cpu_s: tuple[float, ...]  # each service process, busiest first
    redis_cpu_s: float
    verdict: str = ""
    steal: float | None = None  # share of the machine's CPU time other guests took meanwhile

    @property
    def service_cpu_s(self) -> float:
        return sum(self.process_cpu_s)

    @property
    def sustained(self) -> bool:
        return self.verdict == SUSTAINED

    def per_request(self) -> str:
        n = max(1, self.report.sent)
        return (
            f"service CPU {1000 * self.service_cpu_s / n:.2f} ms/request (all its processes), "
            f"Redis CPU {1e6 * self.redis_cpu_s / n:.0f} µs/request"
        )

    def stolen(self) -> str:
        return "n/a" if self.steal is None else f"{100 * self.steal:.0f}%"


STEAL_WARN_SHARE = 0.05
"""Steal above this share of the machine's CPU time gets a warning (a rule of thumb of ours)."""

SUSTAINED = "sustained"
CLIENT_BOUND = "the client used a whole core"


def judge(report: LoadReport, p99_bound_ms: float) -> str:
    """Whether a step sustained its offered rate, else the first reason it did not."""
    # Late sends alone do not stop the search: near saturation the service takes both cores and
    # the client waits for one, which is part of the latency it reports. A client that needs a
    # whole core itself, though, measures itself rather than the service.
    if report.client_cpu_share > CPU_WARN_SHARE:
        return CLIENT_BOUND
    if report.error_count:
        top = sorted(report.errors.items(), key=lambda kv: -kv[1])[:2]
        return f"{report.error_count:,} errors (" + "; ".join(f"{k}: {v:,}" for k, v in top) + ")"
    if report.achieved_rate_per_s < ACHIEVED_SHARE * report.offered_rate_per_s:
        return f"achieved under {100 * ACHIEVED_SHARE:.0f}% of offered"
    if not report.latency.p99_ms <= p99_bound_ms:
        return f"p99 {report.latency.p99_ms:.1f} ms > {p99_bound_ms:g} ms"
    return SUSTAINED


class Bench:
    """Runs loads against the started service and measures CPU around them."""

    def __init__(
        self, args: argparse.Namespace, service: ServiceProcess, redis: RedisProcess
    ) -> None:
        self.args = args
        self.service = service
        self.redis = redis
        self.events = scenario_events(args.distinct, args.seed)

    def run(self, path: str, rate: float, duration_s: float) -> Measured:
        n = request_count(duration_s, rate)
        prefixes = body_prefixes(self.events, n, secrets.token_hex(4))
        config = LoadConfig(
            self.service.base + path, rate, duration_s, self.args.connections, self.args.drain
        )
        service0, redis0, machine0 = self.service.cpu_s(), self.redis.cpu_s(), machine_jiffies()
        report = run_async(run_load(config, prefixes))
        service1, redis1, machine1 = self.service.cpu_s(), self.redis.cpu_s(), machine_jiffies()
        used = sorted((t - service0.get(pid, 0.0) for pid, t in service1.items()), reverse=True)
        verdict = judge(report, self.args.p99_bound_ms)
        steal = steal_share(machine0, machine1)
        return Measured(report, tuple(used), redis1 - redis0, verdict, steal)

    def wait_quiet(self) -> None:
        """Wait until the service and Redis have worked off what earlier runs queued (their
        write-behind queues, requests still in their loops): under 10% of a core for a second."""
        time.sleep(self.args.settle)
        deadline = time.monotonic() + self.args.quiet_timeout
        while time.monotonic() < deadline:
            before = sum(self.service.cpu_s().values()) + self.redis.cpu_s()
            time.sleep(1.0)
            if sum(self.service.cpu_s().values()) + self.redis.cpu_s() - before < QUIET_CPU_S:
                return
        print(f"  (the service was still busy after {self.args.quiet_timeout:g} s; going on)")

    def step(self, path: str, rate: float) -> Measured:
        self.wait_quiet()
        m = self.run(path, rate, self.args.step_duration)
        r = m.report
        print(
            f"  {path:14} offered {rate:8,.0f}/s  achieved {r.achieved_rate_per_s:8,.0f}/s  "
            f"p50 {r.latency.p50_ms:7.2f}  p99 {r.latency.p99_ms:8.2f}  "
            f"p99.9 {r.latency.p999_ms:8.2f} ms  errors {r.error_count:,}  "
            f"late {r.late_sends:,}  client CPU {100 * r.client_cpu_share:3.0f}%  "
            f"load {load_average()}  steal {m.stolen()}  -> {m.verdict}",
            flush=True,
        )
        return m

    def probe(self, path: str) -> tuple[int, str]:
        body = body_prefixes(self.events, 1, "probe" + secrets.token_hex(4))[0]
        return self.service.post(path, body + f"{time.time():.3f}}}".encode())


def _bracket(bench: Bench, path: str) -> tuple[Measured | None, Measured | None]:
    """Geometric steps up from ``--start-rate`` until one fails (or down, if the first fails)."""
    args = bench.args
    first = bench.step(path, args.start_rate)
    if first.sustained:
        best, rate = first, args.start_rate * args.step_factor
        while rate <= args.max_rate:
            m = bench.step(path, rate)
            if not m.sustained:
                return best, m
            best, rate = m, rate * args.step_factor
        return best, None
    worst, rate = first, args.start_rate / args.step_factor
    while rate >= MIN_RATE:
        m = bench.step(path, rate)
        if m.sustained:
            return m, worst
        worst, rate = m, rate / args.step_factor
    return None, worst


def saturate(bench: Bench, path: str) -> tuple[Measured | None, Measured | None]:
    """Highest sustained step and lowest step not sustained (bracketing, then bisection)."""
    best, worst = _bracket(bench, path)
    for _ in range(bench.args.refine):
        if best is None or worst is None or worst.verdict == CLIENT_BOUND:
            break
        low, high = best.report.offered_rate_per_s, worst.report.offered_rate_per_s
        m = bench.step(path, (low * high) ** 0.5)
        best, worst = (m, worst) if m.sustained else (best, m)
    return best, worst


def _summary_line(path: str, best: Measured | None, worst: Measured | None) -> str:
    rate = f"{best.report.offered_rate_per_s:8,.0f} req/s" if best else "    none sustained"
    line = f"  {path:16}{rate}"
    if best is not None:
        line += f"  (p99 {best.report.latency.p99_ms:.1f} ms; {best.per_request()})"
    if worst is not None:
        line += (
            f"\n  {'':16}first not sustained: {worst.report.offered_rate_per_s:,.0f} req/s "
            f"({worst.verdict})"
        )
        if worst.verdict == CLIENT_BOUND:
            line += ": the figure above is a floor set by the client, not the service"
    return line


def phase_steady(bench: Bench) -> None:
    args = bench.args
    print(f"\n== 1. /v1/score at {args.rate:,.0f} requests/s for {args.duration:g} s", flush=True)
    bench.wait_quiet()
    m = bench.run("/v1/score", args.rate, args.duration)
    print(format_report(m.report))
    print(f"server side       {m.per_request()}")
    split = ", ".join(f"{t:.1f}" for t in m.process_cpu_s if t >= 0.05)
    print(f"service processes CPU seconds, busiest first: {split}")
    print(f"load average      {load_average()} (1 minute; {os.cpu_count()} CPUs)")
    print(
        f"stolen            {m.stolen()} of the machine's CPU time went to other virtual "
        "machines during the run (steal, /proc/stat)"
    )
    if m.steal is not None and m.steal > STEAL_WARN_SHARE:
        print(
            "WARNING: the hypervisor ran other guests on this machine's CPUs during the run: "
            "latencies then include waits no code change can remove, and figures from such a "
            "run do not compare with a quiet one."
        )
    if args.workers > 1 and m.process_cpu_s and m.process_cpu_s[0] > 0.75 * m.service_cpu_s:
        print(
            "WARNING: one service process did most of the work: the client's keep-alive "
            "connections landed mostly on one worker (each worker listens on a socket of its "
            "own, and the kernel spreads connections by a hash of their ports: few connections "
            "can still split unevenly)."
        )


def phase_saturation(bench: Bench, reference: bool) -> None:
    args = bench.args
    print(
        f"\n== 2. saturation: steps of {args.step_duration:g} s from {args.start_rate:,.0f}/s, "
        f"x{args.step_factor:g} per step, then {args.refine} bisections; sustained = no errors, "
        f">= {100 * ACHIEVED_SHARE:.0f}% achieved, p99 <= {args.p99_bound_ms:g} ms, "
        f"client under {100 * CPU_WARN_SHARE:.0f}% of a core",
        flush=True,
    )
    results = {"/v1/score": saturate(bench, "/v1/score")}
    if reference:
        results["/v1/reference"] = saturate(bench, "/v1/reference")
    print("\nsaturation throughput (highest offered rate sustained):")
    for path, (best, worst) in results.items():
        print(_summary_line(path, best, worst))
    score, ref = results["/v1/score"][0], results.get("/v1/reference", (None, None))[0]
    if score is not None and ref is not None:
        s, r = score.report.offered_rate_per_s, ref.report.offered_rate_per_s
        print(
            f"  score / reference = {s / r:.2f}: scoring adds about {1000 / s - 1000 / r:.2f} ms "
            "of this machine's time per request at saturation (1/score - 1/reference)"
        )


def warm_up(bench: Bench) -> bool:
    """Warm both routes; False when the reference endpoint is not served."""
    status, text = bench.probe("/v1/score")
    if status != 200:
        raise BenchError(f"POST /v1/score answered {status}: {text[:300]}")
    status, text = bench.probe("/v1/reference")
    reference = status == 200
    if not reference:
        print(
            f"NOTE: POST /v1/reference answered {status}: the app does not serve the reference "
            "endpoint (EMBERSCORE_REFERENCE_ENDPOINT=true must include "
            "service.routes.reference.router); its saturation is skipped."
        )
    args = bench.args
    for path in ("/v1/score", "/v1/reference") if reference else ("/v1/score",):
        m = bench.run(path, args.warmup_rate, args.warmup)
        r = m.report
        print(
            f"warm-up {path:14} {r.ok:,} answered at {args.warmup_rate:g}/s, "
            f"{r.error_count:,} errors, p99 {r.latency.p99_ms:.1f} ms",
            flush=True,
        )
    return reference


def describe_machine(redis_version: str, args: argparse.Namespace) -> None:
    print(
        f"machine: {os.cpu_count()} CPUs; Python {sys.version.split()[0]}; redis-server "
        f"{redis_version}; service: {args.workers} workers"
        + (f" ({args.factory})" if args.factory else " (emberscore serve)")
        + f"; client: 1 process, {args.connections} keep-alive connections; "
        f"load average {load_average()} before the run"
    )


def _args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    add = p.add_argument
    add("--rate", type=float, default=1000.0, help="phase 1 offered rate (default 1000/s)")
    add("--duration", type=float, default=60.0, help="phase 1 seconds (default 60)")
    add("--warmup", type=float, default=10.0, help="warm-up seconds per route (default 10)")
    add("--warmup-rate", type=float, default=200.0, help="warm-up rate (default 200/s)")
    add("--step-duration", type=float, default=10.0, help="seconds per saturation step (10)")
    add("--start-rate", type=float, default=250.0, help="first saturation step (250/s)")
    add("--step-factor", type=float, default=1.4, help="rate multiplier per step (1.4)")
    add("--refine", type=int, default=2, help="bisection steps after the first failure (2)")
    add("--max-rate", type=float, default=50_000.0, help="stop the search here")
    add("--p99-bound-ms", type=float, default=50.0, help="p99 bound of a sustained step (50)")
    add("--settle", type=float, default=2.0, help="pause before each step, seconds (2)")
    add("--quiet-timeout", type=float, default=120.0, help="longest wait for an idle service")
    add("--skip-saturation", action="store_true", help="phase 1 only")
    add("--connections", type=int, default=64, help="client keep-alive connections (64)")
    add("--drain", type=float, default=10.0, help="seconds to wait for answers after a run")
    add("--workers", type=int, default=2, help="service worker processes (2)")
    add("--factory", help="run uvicorn with this app factory instead of emberscore serve")
    add("--distinct", type=int, default=20_000, help="distinct scenario events to cycle")
    add("--seed", type=int, default=7, help="scenario seed")
    add("--keep-logs", type=Path, help="folder for the Redis and service logs (kept)")
    args = p.parse_args(argv)
    if args.step_factor <= 1.0 or args.start_rate <= 0 or args.refine < 0:
        p.error("--step-factor must be > 1, --start-rate > 0 and --refine >= 0")
    return args


def bench(args: argparse.Namespace, folder: Path) -> None:
    redis = RedisProcess(folder)
    service: ServiceProcess | None = None
    try:
        version = redis.wait_ready()
        service = ServiceProcess(redis.url, folder, args.workers, args.factory)
        service.wait_ready()
        describe_machine(version, args)
        b = Bench(args, service, redis)
        reference = warm_up(b)
        phase_steady(b)
        if not args.skip_saturation:
            phase_saturation(b, reference)
    finally:
        if service is not None:
            service.stop()
        redis.stop()


def main(argv: list[str] | None = None) -> int:
    args = _args(argv)
    try:
        if args.keep_logs is not None:
            args.keep_logs.mkdir(parents=True, exist_ok=True)
            bench(args, args.keep_logs.resolve())
        else:
            with tempfile.TemporaryDirectory(prefix="emberscore-bench-") as folder:
                bench(args, Path(folder))
    except (BenchError, LoadError) as exc:
        print(f"bench_service: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("bench_service: interrupted", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":
    sys.exit(main())
