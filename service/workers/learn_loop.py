"""``emberscore learn``: the one process that applies labels and publishes the model (Redis mode).

The loop, until SIGTERM or SIGINT:

1. read a batch from the label queue as a member of its consumer group (this learner's
   unacknowledged labels first, so a restarted learner loses nothing);
2. apply each label (`Learner.apply_label`: idempotent, so a label read twice counts once);
3. publish a snapshot if anything was learned, then acknowledge the batch;
4. learn, as legitimate, sampled events whose maturity period has passed by the wall clock.

The learner starts from the published snapshot when there is one, and carries on its version
numbers. A stop signal ends the loop after the batch in hand. With ``once`` the queue is drained
and the process exits (what tests and cron-style runs use).

Known limit: if the process dies between applying a batch and publishing its snapshot, the
identifier statistics keep every label (they are written as each label is applied) but the model
misses that batch's examples, as their redelivery is recognised as duplicates.

The label-lag histogram and the learner's counters are served on ``learner_metrics_port`` when
it is set (the API's ``/metrics`` has the label lag only in embedded mode, where labels are
applied in the API process).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any, cast

from prometheus_client import start_http_server

from scoring.config import ScoringConfig
from scoring.fusion import ModelSnapshot, model_features
from scoring.logrecord import RecordCodec, RecordError
from service.config import Settings, SettingsError
from service.metrics import Metrics
from service.stores.base import StateStore, StoreUnavailable
from service.workers.learner import LabelOutcome, Learner

log = logging.getLogger("emberscore.learner")
ONCE_BLOCK_MS = 50
RETRY_S = 1.0


@dataclass
class LearnStats:
    """What one run of the loop did."""

    batches: int = 0
    labels: int = 0
    outcomes: dict[str, int] = field(default_factory=dict)
    matured: int = 0
    model_version: int = 0


class RecordTap:
    """The store as the `Learner` sees it, keeping each record it loads for the label lag.

    The record is already read to apply the label; keeping it here saves a second read.
    """

    def __init__(self, store: Any) -> None:
        self.store = store
        self.loaded: dict[bytes, bytes] = {}

    async def load_record(self, event_digest: bytes) -> bytes | None:
        data: bytes | None = await self.store.load_record(event_digest)
        if data is not None:
            self.loaded[event_digest] = data
        return data

    def __getattr__(self, name: str) -> Any:
        return getattr(self.store, name)


def check_settings(settings: Settings) -> None:
    """The learner needs Redis, and in production a hashing secret of its own."""
    if settings.redis_url is None:
        raise SettingsError("emberscore learn needs EMBERSCORE_REDIS_URL (the label queue)")
    if settings.mode == "production" and settings.uses_development_secret():
        raise SettingsError("production mode refuses to start: set EMBERSCORE_HASH_SECRET")


async def restore(store: Any, config: ScoringConfig) -> ModelSnapshot | None:
    """The published snapshot, if there is one the learner can go on from."""
    data = await store.load_snapshot()
    if data is None:
        return None
    snapshot = ModelSnapshot.from_bytes(data)  # SnapshotError: damaged, refuse to overwrite
    if snapshot.features != model_features(RecordCodec(config).layout):
        log.warning(
            "the published model (version %d) was learned on other features than this "
            "configuration produces: starting a new model",
            snapshot.version,
        )
        return None
    return snapshot


class LearnLoop:
    """Label queue → learner → snapshot, over one store."""

    def __init__(self, store: Any, settings: Settings, learner: Learner, tap: RecordTap) -> None:
        self.store = store
        self.settings = settings
        self.learner = learner
        self.tap = tap
        self.codec = RecordCodec(learner.config)
        self.metrics = Metrics()
        self.stats = LearnStats(model_version=learner.model.version)

    @classmethod
    async def open(cls, store: Any, settings: Settings) -> LearnLoop:
        config = settings.scoring_config()
        snapshot = await restore(store, config)
        tap = RecordTap(store)
        learner = Learner(cast(StateStore, tap), config, snapshot=snapshot)
        if snapshot is not None:
            log.info("going on from model version %d", snapshot.version)
        return cls(store, settings, learner, tap)

    async def step(self, block_ms: int) -> int:
        """One batch of labels, then maturity; returns the number of labels read."""
        batch = await self.store.read_labels(
            self.settings.learner_consumer, self.settings.learner_batch, block_ms
        )
        if batch:
            await self._apply(batch)
        self.stats.matured += await self.learner.catch_up(time.time())
        self.stats.model_version = self.learner.model.version
        return len(batch)

    async def _apply(self, batch: list[tuple[str, bytes, bool, float]]) -> None:
        for _, digest, is_fraud, labeled_at_s in batch:
            outcome = await self.learner.apply_label(digest, is_fraud, publish=False)
            self._count(outcome, digest, labeled_at_s)
        if self.learner.pending:
            await self.learner.publish()
        await self.store.ack_labels([entry_id for entry_id, *_ in batch])
        self.stats.batches += 1
        self.stats.labels += len(batch)

    def _count(self, outcome: LabelOutcome, digest: bytes, labeled_at_s: float) -> None:
        self.stats.outcomes[outcome.value] = self.stats.outcomes.get(outcome.value, 0) + 1
        self.metrics.labels.labels(outcome.value).inc()
        data = self.tap.loaded.pop(digest, None)
        if data is None or outcome not in (LabelOutcome.APPLIED, LabelOutcome.CHANGED):
            return
        try:
            ts_s = self.codec.decode(data).ts_s
        except RecordError:
            return
        self.metrics.label_lag.observe(max(labeled_at_s - ts_s, 0.0))

    async def run(self, stop: asyncio.Event, once: bool) -> LearnStats:
        """Loop until ``stop`` is set (or, with ``once``, until the queue is empty)."""
        block_ms = ONCE_BLOCK_MS if once else self.settings.learner_block_ms
        while not stop.is_set():
            try:
                read = await self.step(block_ms)
            except StoreUnavailable as exc:
                if once:
                    raise
                log.warning("store unavailable (%s); trying again", type(exc).__name__)
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), RETRY_S)
                continue
            if once and not read:
                break
        return self.stats


@contextlib.contextmanager
def stop_on_signals(stop: asyncio.Event) -> Iterator[None]:
    """Set ``stop`` on SIGTERM or SIGINT while inside (main thread only; elsewhere a no-op)."""
    loop = asyncio.get_running_loop()
    installed = []
    for sig in (signal.SIGTERM, signal.SIGINT):
        with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
            loop.add_signal_handler(sig, stop.set)
            installed.append(sig)
    try:
        yield
    finally:
        for sig in installed:
            loop.remove_signal_handler(sig)


async def learn(
    settings: Settings, once: bool, store: Any = None, stop: asyncio.Event | None = None
) -> LearnStats:
    """Run the learner over ``store`` (default: a `RedisStore` for the settings), then close it."""
    if store is None:
        from service.stores.redis import RedisStore

        store = await RedisStore.connect(settings, settings.scoring_config())
    stop = stop or asyncio.Event()
    try:
        with stop_on_signals(stop):
            loop = await LearnLoop.open(store, settings)
            if settings.learner_metrics_port is not None:
                start_http_server(settings.learner_metrics_port, registry=loop.metrics.registry)
            return await loop.run(stop, once)
    finally:
        await store.close()


def run_learner(once: bool) -> int:
    """``emberscore learn [--once]``: settings from the environment; returns the exit status."""
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    settings = Settings()
    check_settings(settings)
    stats = asyncio.run(learn(settings, once))
    outcomes = ", ".join(f"{n} {k}" for k, n in sorted(stats.outcomes.items())) or "none"
    print(
        f"emberscore learn: {stats.labels} labels in {stats.batches} batches ({outcomes}); "
        f"{stats.matured} matured events learned; model version {stats.model_version}",
        file=sys.stderr,
    )
    return 0
