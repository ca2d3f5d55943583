"""CPU per scored event, layer by layer, in this process, against a redis-server of its own.

    .venv/bin/python -m loadtest.bench_layers                # about a minute
    .venv/bin/python -m loadtest.bench_layers --events 2000 --concurrency 1

Prints, per event or request (``time.process_time`` of this process; Redis's own CPU from
``INFO cpu``), for the same invented demo events:

- the store's round trip (`RedisStore.begin`) in each form: plain commands read by redis-py's
  Python parser, plain commands read by hiredis, and one script per identifier on the shared
  connection (`service.stores.redis_wire`);
- the engine (`Engine.score`: plan, round trip, features, model, write-behind);
- the application called directly over ASGI (no HTTP server): ``POST /v1/score`` and
  ``POST /v1/reference``.

Requests run ``--concurrency`` at a time on one event loop, as a worker's do. Nothing is
asserted: the figures are for comparing one change with another on the same machine, and
anything else running on the machine moves them (the load average is printed).
"""

from __future__ import annotations

import argparse
import asyncio
import os
import secrets
import sys
import tempfile
import time
from collections.abc import Awaitable, Callable, Coroutine, Sequence
from functools import partial
from pathlib import Path
from typing import Any

from pydantic import SecretStr

if __package__ in (None, ""):  # run as a script: find the package
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from loadtest.bench_processes import RedisProcess, load_average
from loadtest.load_http import body_prefixes, scenario_events

WARM_UP = 1_000


def bodies(events: list[dict[str, Any]], n: int) -> list[bytes]:
    """``n`` request bodies with fresh event ids and the current time."""
    now = f"{time.time():.3f}}}".encode()
    return [prefix + now for prefix in body_prefixes(events, n, secrets.token_hex(4))]


async def per_call(
    calls: Sequence[Callable[[], Awaitable[Any]]], concurrency: int, redis: RedisProcess
) -> tuple[float, float]:
    """Milliseconds of this process's CPU and microseconds of Redis's, per call."""
    gate = asyncio.Semaphore(concurrency)

    async def one(call: Callable[[], Awaitable[Any]]) -> None:
        async with gate:
            await call()

    redis0, cpu0 = redis.cpu_s(), time.process_time()
    await asyncio.gather(*(one(c) for c in calls))
    cpu1, redis1 = time.process_time(), redis.cpu_s()
    return 1000 * (cpu1 - cpu0) / len(calls), 1e6 * (redis1 - redis0) / len(calls)


async def asgi_post(app: Any, path: str, body: bytes) -> int:
    """One request straight into the ASGI application; its status."""
    scope = {
        "type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
        "scheme": "http", "path": path, "raw_path": path.encode(), "root_path": "",
        "query_string": b"", "client": ("127.0.0.1", 1), "server": ("127.0.0.1", 2),
        "headers": [(b"content-type", b"application/json"),
                    (b"content-length", str(len(body)).encode())],
    }  # fmt: skip
    sent = False
    status = 0

    async def receive() -> dict[str, Any]:
        nonlocal sent
        if sent:
            await asyncio.sleep(3600)
        sent = True
        return {"type": "http.request", "body": body, "more_body": False}

    async def send(message: dict[str, Any]) -> None:
        nonlocal status
        status = message.get("status", status)

    await app(scope, receive, send)
    return status


def _python_parser(store: Any) -> None:
    """Make the store's request-path client read replies in Python instead of hiredis."""
    from redis._parsers import _AsyncRESP2Parser

    store.fast.connection_pool.connection_kwargs["parser_class"] = _AsyncRESP2Parser


FORMS = ("plain, Python parser", "plain, hiredis", "scripted, shared connection")


def _line(label: str, cpu_ms: float, redis_us: float) -> str:
    return f"  {label:46} {cpu_ms:6.3f} ms   Redis {redis_us:5.0f} µs"


async def store_form(
    form: str, args: argparse.Namespace, redis: RedisProcess, events: list[Any]
) -> None:
    """The round trip in one form; for the scripted form, the engine too."""
    from scoring.fusion import Fusion
    from scoring.hashing import KeyHasher
    from service.api_models import EventIn
    from service.config import Settings
    from service.engine import Engine
    from service.stores.redis import RedisStore

    settings = Settings(
        redis_url=redis.url, hash_secret=SecretStr("bench-layers"), score_budget_ms=5000.0
    )
    config = settings.scoring_config()
    store = await RedisStore.connect(settings, config)
    if form.startswith("plain"):
        store.exchange.wire = None
    if "Python" in form:
        _python_parser(store)
    engine = Engine(store, config, KeyHasher(b"bench-layers"), Fusion(config))
    try:
        parsed = [EventIn.model_validate_json(b).to_event() for b in bodies(events, WARM_UP)]
        await per_call([partial(engine.score, e) for e in parsed], args.concurrency, redis)
        parsed = [EventIn.model_validate_json(b).to_event() for b in bodies(events, args.events)]
        plans = [engine.planner.plan(e) for e in parsed]
        calls = [partial(store.begin, p, read=True) for p in plans]
        print(_line(f"store round trip, {form}", *await per_call(calls, args.concurrency, redis)))
        if form.startswith("scripted"):
            parsed = [
                EventIn.model_validate_json(b).to_event() for b in bodies(events, args.events)
            ]
            scored = [partial(engine.score, e) for e in parsed]
            figures = await per_call(scored, args.concurrency, redis)
            print(_line("Engine.score (write-behind included)", *figures))
        await store.flush()
    finally:
        await store.close()


async def application(args: argparse.Namespace, redis: RedisProcess, events: list[Any]) -> None:
    """Both event routes, straight into the ASGI application."""
    from service.app import create_app
    from service.config import Settings

    settings = Settings(
        redis_url=redis.url, hash_secret=SecretStr("bench-layers"), reference_endpoint=True,
        score_budget_ms=5000.0,
    )  # fmt: skip
    app = create_app(settings, freeze=True)
    async with app.router.lifespan_context(app):
        for path in ("/v1/score", "/v1/reference"):
            warm = [partial(asgi_post, app, path, b) for b in bodies(events, WARM_UP)]
            await per_call(warm, args.concurrency, redis)
            calls = [partial(asgi_post, app, path, b) for b in bodies(events, args.events)]
            print(_line(f"ASGI {path}", *await per_call(calls, args.concurrency, redis)))
        await app.state.runtime.store.flush()


async def main_async(args: argparse.Namespace, redis: RedisProcess) -> None:
    events = scenario_events(20_000, args.seed)
    print(
        f"CPU per event (this process; Redis separately), {args.events:,} events, "
        f"{args.concurrency} at a time; load average {load_average()} ({os.cpu_count()} CPUs)"
    )
    for form in FORMS:
        await store_form(form, args, redis, events)
    await application(args, redis, events)


def run_loop(main: Any) -> None:
    """Run on uvloop when installed, as the service's workers do."""
    try:
        import uvloop
    except ImportError:
        asyncio.run(main)
        return
    uvloop.run(main)


def run_with_redis(prefix: str, main: Callable[[RedisProcess], Coroutine[Any, Any, Any]]) -> None:
    """Start a redis-server of our own (its files in a temporary folder named ``prefix``...),
    run ``main(redis)`` on the event loop of `run_loop`, and stop the server by its pid."""
    with tempfile.TemporaryDirectory(prefix=prefix) as folder:
        redis = RedisProcess(Path(folder))
        try:
            redis.wait_ready()
            run_loop(main(redis))
        finally:
            redis.stop()


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    p.add_argument("--events", type=int, default=4_000, help="events per figure (4000)")
    p.add_argument("--concurrency", type=int, default=8, help="requests at a time (8)")
    p.add_argument("--seed", type=int, default=7, help="scenario seed")
    args = p.parse_args(argv)
    run_with_redis("emberscore-layers-", lambda redis: main_async(args, redis))
    return 0


if __name__ == "__main__":
    sys.exit(main())
