"""The learner: applies labels to identifier statistics and teaches the online model.

One learner writes the model (river supports neither concurrent learning nor merging models). It
fetches the record logged when the labelled event was scored, adds the label to the statistics of
every identifier the event carried (anchored at the event's time), learns from the logged
features, and publishes a snapshot. Events that stay unlabelled for the maturity period are
learned as legitimate, on a sample (see `scoring.fusion`).

With the embedded store the learner runs inside the serving (or replaying) process and publishes
straight into its `Fusion`; with Redis it runs as its own process (`emberscore learn`).
"""

from __future__ import annotations

import enum

from scoring.config import ScoringConfig
from scoring.fusion import Fusion, ModelSnapshot, OnlineModel, model_features
from scoring.logrecord import RecordCodec, RecordError
from scoring.prior import Prior
from scoring.profile import TimeBasis
from service.stores.base import StateStore


class LabelOutcome(enum.Enum):
    APPLIED = "applied"
    CHANGED = "changed"
    DUPLICATE = "duplicate"
    UNKNOWN_EVENT = "unknown_event"


class Learner:
    """Label and maturity processing over a store.

    Parameters
    ----------
    store
        Where records, labels, statistics and snapshots live.
    config
        Scoring configuration.
    fusion
        When given (embedded mode), every publication switches it to the new snapshot at once.
    publish_every
        Publish after this many learned examples (labels always publish when the call ends).
    """

    def __init__(
        self,
        store: StateStore,
        config: ScoringConfig,
        fusion: Fusion | None = None,
        snapshot: ModelSnapshot | None = None,
    ) -> None:
        self.store = store
        self.config = config
        self.codec = RecordCodec(config)
        self.prior = Prior(config)
        self.fusion = fusion
        features = model_features(self.codec.layout)
        if snapshot is not None and snapshot.features == features:
            self.model = OnlineModel.restore(snapshot, config.learning_rate, config.l2)
        else:
            self.model = OnlineModel(features, config.learning_rate, config.l2)
        self.pending = 0

    async def apply_label(
        self, event_digest: bytes, is_fraud: bool, *, publish: bool = True
    ) -> LabelOutcome:
        """Apply one label; idempotent, and a changed label replaces the earlier one."""
        data = await self.store.load_record(event_digest)
        if data is None:
            return LabelOutcome.UNKNOWN_EVENT
        previous = await self.store.set_label(event_digest, is_fraud)
        if previous is is_fraud:
            return LabelOutcome.DUPLICATE
        try:
            record = self.codec.decode(data)
        except RecordError:
            return LabelOutcome.UNKNOWN_EVENT
        basis = TimeBasis.at(record.ts_s, self.config)
        if previous is not None:
            await self.store.add_label(record.identifiers, basis, previous, -1.0)
        await self.store.add_label(record.identifiers, basis, is_fraud, 1.0)
        if record.features is not None:
            self._learn(record.features, is_fraud)
            if publish:
                await self.publish()
        return LabelOutcome.APPLIED if previous is None else LabelOutcome.CHANGED

    async def catch_up(self, now_s: float) -> int:
        """Learn, as legitimate, sampled events unlabelled for the maturity period by ``now_s``."""
        learned = 0
        for matured in await self.store.due(now_s):
            if await self.store.get_label(matured.event_digest) is not None:
                continue
            try:
                record = self.codec.decode(matured.record)
            except RecordError:
                continue
            if record.features is not None:
                self._learn(record.features, False)
                learned += 1
        if learned:
            await self.publish()
        return learned

    def _learn(self, features: tuple[float, ...], is_fraud: bool) -> None:
        points = self.prior.points(features)
        self.model.learn_one([*features, points], is_fraud)
        self.pending += 1

    async def publish(self) -> ModelSnapshot:
        """Save a new snapshot version (and use it at once in embedded mode)."""
        snapshot = self.model.snapshot()
        await self.store.save_snapshot(snapshot.to_bytes(), snapshot.version)
        if self.fusion is not None:
            self.fusion.use(snapshot)
        self.pending = 0
        return snapshot
