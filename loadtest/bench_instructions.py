"""Instructions per request of the application over ASGI, counted by callgrind: a figure that
does not move with the machine's load, for comparing one change (or one interpreter) with another.

    .venv/bin/python -m loadtest.bench_instructions                    # about a minute
    .venv/bin/python -m loadtest.bench_instructions --path /v1/reference --requests 400

The script runs itself again under ``valgrind --tool=callgrind`` with counting switched off,
starts a redis-server of its own, sends ``--warm-up`` requests straight into the application
(``create_app``, no HTTP server, one at a time), then switches counting on
(``callgrind_control --instr=on``) for ``--requests`` more and off again, and prints the
instructions counted divided by the requests. Only this process is counted: Redis's work, the
HTTP server and the kernel are not. The count is repeatable to a few parts in ten thousand on
one machine (same interpreter, same packages), whatever else runs; it is not a time: a change
that saves instructions but misses caches more can still be slower, so confirm a gain with the
service benchmark on a quiet machine.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

if __package__ in (None, ""):  # run as a script: find the package
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from loadtest.bench_layers import asgi_post, bodies, run_with_redis
from loadtest.bench_processes import BenchError, RedisProcess
from loadtest.load_http import scenario_events

COLLECTED = re.compile(r"Collected\s*:\s*(\d+)")


def _counting(on: bool) -> None:
    """Switch callgrind's counting for this process on or off."""
    subprocess.run(
        ["callgrind_control", f"--instr={'on' if on else 'off'}", str(os.getpid())],
        check=True,
        stdout=subprocess.DEVNULL,
    )


async def _inner(args: argparse.Namespace, redis: RedisProcess) -> None:
    from pydantic import SecretStr

    from service.app import create_app
    from service.config import Settings

    settings = Settings(
        redis_url=redis.url, hash_secret=SecretStr("bench-instructions"),
        reference_endpoint=True, score_budget_ms=60_000.0,
    )  # fmt: skip
    app = create_app(settings, freeze=True)
    events = scenario_events(20_000, args.seed)
    async with app.router.lifespan_context(app):
        for body in bodies(events, args.warm_up):
            await asgi_post(app, args.path, body)
        await app.state.runtime.store.flush()
        counted = bodies(events, args.requests)
        _counting(True)
        for body in counted:
            await asgi_post(app, args.path, body)
        await app.state.runtime.store.flush()  # the write-behind of the counted requests
        _counting(False)


def _outer(args: argparse.Namespace) -> int:
    for tool in ("valgrind", "callgrind_control"):
        if shutil.which(tool) is None:
            raise BenchError(f"{tool} not found on PATH (Debian: apt-get install valgrind)")
    with tempfile.TemporaryDirectory(prefix="emberscore-instructions-") as folder:
        command = [
            "valgrind", "--tool=callgrind", "--instr-atstart=no",
            f"--callgrind-out-file={Path(folder) / 'callgrind.out'}",
            sys.executable, "-m", "loadtest.bench_instructions", "--inner",
            "--path", args.path, "--requests", str(args.requests),
            "--warm-up", str(args.warm_up), "--seed", str(args.seed),
        ]  # fmt: skip
        done = subprocess.run(command, capture_output=True, text=True, check=False)
    found = COLLECTED.search(done.stderr)
    if done.returncode != 0 or found is None:
        tail = "\n".join(done.stderr.strip().splitlines()[-15:])
        raise BenchError(f"the counted run failed (exit status {done.returncode}):\n{tail}")
    total = int(found.group(1))
    print(
        f"{args.path}: {total / args.requests:,.0f} instructions per request "
        f"({total:,} over {args.requests:,} requests after {args.warm_up:,} uncounted; "
        f"Python {sys.version.split()[0]} at {sys.executable})"
    )
    return 0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    p.add_argument("--path", default="/v1/score", choices=["/v1/score", "/v1/reference"])
    p.add_argument("--requests", type=int, default=400, help="requests counted (400)")
    p.add_argument("--warm-up", type=int, default=300, help="requests before counting (300)")
    p.add_argument("--seed", type=int, default=7, help="scenario seed")
    p.add_argument("--inner", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.requests < 1 or args.warm_up < 0:
        p.error("--requests must be at least 1 and --warm-up at least 0")
    try:
        if not args.inner:
            return _outer(args)
        run_with_redis("emberscore-instructions-", lambda redis: _inner(args, redis))
        return 0
    except BenchError as exc:
        print(f"bench_instructions: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
