"""The HTTP application: `create_app(settings)`.

The lifespan opens the store and builds the `Engine` when the application starts, and closes
the store when it stops:

- embedded mode (no Redis URL): a `MemoryStore` and an in-process `Learner` that applies labels
  as they arrive and switches the model at once (a trial service: state is lost on exit);
- Redis mode: a `RedisStore` shared by every worker; labels are queued for the learner process,
  and a background task asks for the published model's version every ``model_poll_s`` seconds
  and switches to a new snapshot when there is one.

`app_from_environment` is the factory uvicorn calls in each worker (settings from the
environment).
"""

from __future__ import annotations

import asyncio
import contextlib
import gc
import logging
from collections.abc import AsyncIterator
from typing import Any

from fastapi import FastAPI
from starlette.types import Receive, Scope, Send

from scoring.event import Event
from scoring.fusion import Fusion, ModelSnapshot, SnapshotError
from scoring.hashing import KeyHasher
from scoring.identifiers_phone import check_region
from service.config import Settings, SettingsError
from service.engine import Engine
from service.metrics import Metrics, RequestMetrics
from service.reputation import Reputation
from service.routes import errors, events, health, labels, reputation, score
from service.routes.deps import Runtime
from service.routes.lane import EventLane
from service.security import ApiKeys, BodySizeLimit
from service.stores.base import StoreUnavailable
from service.stores.memory import MemoryStore
from service.workers.learner import Learner

log = logging.getLogger("emberscore.service")

DESCRIPTION = """Streaming reputation scoring for sign-up and checkout abuse.

Send each event to `POST /v1/score` before deciding on it; send labels (confirmed fraud or
legitimate) to `POST /v1/labels` when they become known. Identifier values are normalised and
keyed-hashed: they are never stored or logged in clear.
"""


def check_settings(settings: Settings) -> None:
    """Refuse settings the service cannot run with (`SettingsError`, with what to change)."""
    settings.check_production()
    if settings.default_region is not None:
        try:
            check_region(settings.default_region)
        except ValueError as exc:
            raise SettingsError(f"EMBERSCORE_DEFAULT_REGION: {exc}") from exc


def _embedded(settings: Settings, metrics: Metrics) -> Runtime:
    config = settings.scoring_config()
    store = MemoryStore(config, settings.idempotency_ttl_s, settings.label_horizon_s)
    fusion = Fusion(config)
    learner = Learner(store, config, fusion)
    hasher = KeyHasher(settings.secret_bytes())
    engine = Engine(store, config, hasher, fusion, learner, settings.default_region)
    reputation_ = Reputation(config, hasher, settings.default_region)
    runtime = Runtime(settings, config, store, engine, metrics, reputation_, "embedded")
    runtime.model_problem = None
    return runtime


class NotConnected:
    """Stands in for the Redis store until it can be reached: every call fails at once.

    The service then answers without state (or 503, per ``on_store_failure``) and reports
    itself not ready, and the model task keeps trying to connect.
    """

    def __init__(self, reason: str) -> None:
        self.reason = reason

    async def ping(self) -> bool:
        return False

    async def close(self) -> None:
        return None

    def __getattr__(self, name: str) -> Any:
        if name.startswith("__"):
            raise AttributeError(name)

        async def unavailable(*args: Any, **kwargs: Any) -> Any:
            raise StoreUnavailable(self.reason)

        return unavailable


async def _connect(settings: Settings) -> Any:
    from service.stores.redis import RedisStore  # the only module that imports redis

    return await RedisStore.connect(settings, settings.scoring_config())


async def _redis(settings: Settings, metrics: Metrics) -> Runtime:
    config = settings.scoring_config()
    try:
        store = await _connect(settings)
    except StoreUnavailable as exc:
        log.error("Redis unreachable at start (%s); answering without state until it is back", exc)
        store = NotConnected(str(exc))
    hasher = KeyHasher(settings.secret_bytes())
    engine = Engine(store, config, hasher, Fusion(config), None, settings.default_region)
    reputation_ = Reputation(config, hasher, settings.default_region)
    return Runtime(settings, config, store, engine, metrics, reputation_, "redis")


async def _reconnect(runtime: Runtime) -> None:
    store = await _connect(runtime.settings)
    runtime.store = runtime.engine.store = store
    log.info("connected to Redis")


async def refresh_model(runtime: Runtime) -> bool:
    """Switch to the published snapshot if its version differs from the one in use.

    Returns True when the model changed. A snapshot that cannot be used (another feature layout,
    damaged bytes) leaves the model in use and is reported by readiness.
    """
    store, fusion = runtime.store, runtime.engine.fusion
    async with asyncio.timeout(runtime.store_timeout_s):
        version = await store.snapshot_version()
        if version is None or version == fusion.snapshot.version:
            runtime.model_problem = None
            return False
        data = await store.load_snapshot()
    if data is None:
        runtime.model_problem = None
        return False
    try:
        fusion.use(ModelSnapshot.from_bytes(data))
    except SnapshotError as exc:
        runtime.model_problem = f"published snapshot version {version} not usable: {exc}"
        log.error("model snapshot %s not usable: %s", version, exc)
        return False
    runtime.model_problem = None
    runtime.metrics.model_version.set(fusion.snapshot.version)
    log.info("switched to model version %d", fusion.snapshot.version)
    return True


async def _follow_once(runtime: Runtime) -> None:
    try:
        if isinstance(runtime.store, NotConnected):
            await _reconnect(runtime)
        await refresh_model(runtime)
    except (TimeoutError, StoreUnavailable) as exc:
        runtime.metrics.store_error("model reload", exc)
        if runtime.model_problem is not None:
            runtime.model_problem = "not loaded yet: the store is unavailable"


async def follow_model(runtime: Runtime) -> None:
    """Every ``model_poll_s`` seconds: connect if not yet connected, then reload the model."""
    while True:
        await asyncio.sleep(runtime.settings.model_poll_s)
        await _follow_once(runtime)


def _warm_up(engine: Engine) -> None:
    """Load what the normalisers load on first use (suffix list, phone metadata) before traffic,
    so that the first requests do not spend their scoring budget on it."""
    engine.planner.plan(
        Event(
            "warm-up",
            0.0,
            "signup",
            account_id="warm-up",
            ip="11.22.33.44",
            device_id="warm-up",
            phone="+44 20 7946 0321",
            email="warm-up@quillpost.example",
        )
    )


def _announce(settings: Settings, runtime: Runtime) -> None:
    if runtime.mode == "embedded":
        log.warning(
            "embedded store (no EMBERSCORE_REDIS_URL): for trying out only; "
            "state is lost when the process stops"
        )
    if not settings.api_keys:
        log.warning("no API keys configured (development mode): requests need no key")
    if settings.uses_development_secret():
        log.warning("the development hashing secret is in use: set EMBERSCORE_HASH_SECRET")


def freeze_heap() -> None:
    """Leave what start-up built (phone metadata, suffix list, model...) out of the cyclic
    garbage collector's full passes: a full pass over it took about 55 ms (measured), a stall
    every few thousand requests that alone exceeds the scoring budget."""
    gc.collect()
    gc.freeze()


def _lifespan(settings: Settings, metrics: Metrics, freeze: bool) -> Any:
    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if settings.redis_url is None:
            runtime = _embedded(settings, metrics)
        else:
            runtime = await _redis(settings, metrics)
            await _follow_once(runtime)
            runtime.tasks.append(asyncio.create_task(follow_model(runtime)))
        app.state.runtime = runtime
        _warm_up(runtime.engine)
        if freeze:
            freeze_heap()
        metrics.model_version.set(runtime.engine.fusion.snapshot.version)
        _announce(settings, runtime)
        try:
            yield
        finally:
            for task in runtime.tasks:
                task.cancel()
            await asyncio.gather(*runtime.tasks, return_exceptions=True)
            await runtime.store.close()
            metrics.process_exit()

    return lifespan


class ServiceApp(FastAPI):
    """FastAPI, with the event routes' common case answered before FastAPI's own stack (the
    fast lane: `service.routes.lane`); every other request goes through FastAPI and the
    service's middlewares."""

    lane: EventLane | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        lane = self.lane
        path = None if lane is None else lane.route_for(scope)
        if lane is None or path is None:
            await super().__call__(scope, receive, send)
            return
        await lane.answer(self, path, scope, receive, send, super().__call__)


def create_app(settings: Settings | None = None, *, freeze: bool = False) -> ServiceApp:
    """The emberscore HTTP application (refuses settings fit only for trying out in production).

    ``freeze`` (a served process: `app_from_environment`) runs `freeze_heap` once started.

    >>> app = create_app(Settings(_env_file=None))
    >>> sorted(p for p in app.openapi()["paths"] if p.startswith("/v1"))[:2]
    ['/v1/events', '/v1/labels']
    """
    settings = settings if settings is not None else Settings()
    check_settings(settings)
    metrics = Metrics(settings.metrics_dir)
    app = ServiceApp(
        title="emberscore",
        version="0.1.0",
        description=DESCRIPTION,
        lifespan=_lifespan(settings, metrics, freeze),
    )
    app.state.api_keys = ApiKeys(k.get_secret_value() for k in settings.api_keys)
    errors.install(app)
    for module in (score, events, labels, reputation, health):
        app.include_router(module.router)
    lane = {"/v1/score": score.score}
    if settings.reference_endpoint:
        from service.routes import reference  # benchmark only

        app.include_router(reference.router)
        lane["/v1/reference"] = reference.reference
    app.lane = EventLane(lane, metrics, settings.max_body_bytes)
    app.add_middleware(errors.ContainErrors)
    app.add_middleware(BodySizeLimit, max_body_bytes=settings.max_body_bytes)
    app.add_middleware(RequestMetrics, metrics=metrics)  # outermost: times everything
    return app


def app_from_environment() -> ServiceApp:
    """Factory for uvicorn (``--factory``): settings from the ``EMBERSCORE_*`` environment."""
    return create_app(Settings(), freeze=True)
