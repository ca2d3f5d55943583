"""``emberscore backfill EVENTS [--labels LABELS] --out SCORES``: replay history point-in-time.

Events are read and checked (`service.files`), put in time order (a stable sort), planned
(identifiers normalised and keyed-hashed), and replayed through the batch path in stages
(`scoring.batch_state`): label schedule and features, learning in the live learner's order,
then scoring in chunks of ``--checkpoint-every`` rows, each chunk streamed to the scores file.
Labels change state only from their ``labeled_at``. The scores equal what the per-event engine
(`service.replay`) gives for the same history.

Bad rows stop the run with the first one's line, field and reason, unless ``--rejects`` is
given (then they are listed there, label rows in a sibling ``*.labels.csv``, and skipped);
``--strict`` always stops at the first. The scores file appears whole or not at all. With
``--checkpoint DIR`` each finished stage and chunk is kept, and a killed run started again with
the same arguments resumes and writes the very same bytes. Settings come from the environment
(`service.config.Settings`): the hashing secret, the label horizon (how long a label may follow
its event) and the scoring configuration.
"""

from __future__ import annotations

import argparse
import re
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import ValidationError

from scoring.batch import LabelColumns, schedule_labels
from scoring.batch_plan import ColumnPlanner, PlannedColumns
from scoring.batch_state import (
    LearnedVersions,
    PreparedReplay,
    final_profiles,
    learn_versions,
    prepare_replay,
    score_range,
)
from scoring.fusion import Fusion, ModelSnapshot, OnlineModel, SnapshotError, model_features
from scoring.hashing import KeyHasher
from service.cli import CommandError
from service.config import Settings, SettingsError
from service.files import ScoreWriter, read_events, read_labels, sort_events
from service.files_base import AtomicOutput, InputError, check_readable, format_of
from service.tables import EventTable, LabelTable, ScoreTable
from service.workers import backfill_checkpoint as ckpt
from service.workers.backfill_progress import Progress
from service.workers.backfill_report import BackfillReport, format_summary
from service.workers.backfill_warm import WarmError, warm_redis

FAULT_HOOK: Callable[[int], None] | None = None
"""Called with the chunk number after each chunk is scored (and kept): tests inject faults here."""

REJECTS_HINT = "; to list bad rows in a file and go on without them, run again with --rejects FILE"
_FIELDS = ("account_id", "device_id", "ip", "phone", "email")


@dataclass(frozen=True)
class BackfillOptions:
    """The command's arguments, checked."""

    events: Path
    out: Path
    labels: Path | None = None
    rejects: Path | None = None
    strict: bool = False
    checkpoint: Path | None = None
    chunk_rows: int = 200_000
    warm: str | None = None
    save_model: Path | None = None
    model: Path | None = None
    show_progress: bool = True

    @classmethod
    def from_args(cls, args: argparse.Namespace) -> BackfillOptions:
        def path(value: str | None) -> Path | None:
            return None if value is None else Path(value)

        if args.checkpoint_every < 1:
            raise CommandError("--checkpoint-every must be at least 1 (events per chunk)")
        return cls(
            events=Path(args.events),
            out=Path(args.out),
            labels=path(args.labels),
            rejects=path(args.rejects),
            strict=bool(args.strict),
            checkpoint=path(args.checkpoint),
            chunk_rows=int(args.checkpoint_every),
            warm=args.warm,
            save_model=path(args.save_model),
            model=path(args.model),
            show_progress=not args.no_progress,
        )

    @property
    def label_rejects(self) -> Path | None:
        """Where bad label rows go: beside the events' reject file, ``<name>.labels.csv``."""
        if self.rejects is None or self.labels is None:
            return None
        return self.rejects.with_name(f"{self.rejects.stem}.labels{self.rejects.suffix or '.csv'}")


def load_settings() -> Settings:
    """Settings from the environment; a bad value is a `SettingsError` naming the variable."""
    try:
        return Settings()
    except ValidationError as exc:  # its own text would quote values, secrets included
        problems = "; ".join(
            f"EMBERSCORE_{'_'.join(str(part) for part in e['loc']).upper()}: {e['msg']}"
            for e in exc.errors()
        )
        raise SettingsError(f"bad setting in the environment: {problems}") from None


def _check_outputs(o: BackfillOptions) -> None:
    """Refuse output paths that cannot work before any time is spent."""
    format_of(o.out)
    for flag, target in (
        ("--out", o.out),
        ("--save-model", o.save_model),
        ("--rejects", o.rejects),
    ):
        if target is not None and not target.parent.is_dir():
            raise InputError(target, f"the folder for {flag} does not exist")
    inputs = [p.resolve() for p in (o.events, o.labels, o.model) if p is not None]
    for flag, target in (
        ("--out", o.out),
        ("--save-model", o.save_model),
        ("--rejects", o.rejects),
    ):
        if target is not None and target.resolve() in inputs:
            raise InputError(target, f"{flag} names an input file: give another path")


# --- reading -----------------------------------------------------------------------------------


@dataclass
class Inputs:
    """Validated, time-sorted events and the labels, with what reading them found."""

    events: EventTable
    labels: LabelTable | None
    events_read: int
    events_rejected: int
    labels_read: int = 0
    labels_rejected: int = 0


def _read(
    reader: Callable[..., Any], path: Path, o: BackfillOptions, reject_path: Path | None
) -> Any:
    """Run a reader; a bad row's message says how to go on without it."""
    rejects = None if o.strict else reject_path
    try:
        return reader(path, strict=o.strict, reject_path=rejects)
    except InputError as exc:
        if exc.line is None or o.strict:
            raise
        raise InputError(
            exc.path, exc.reason + REJECTS_HINT, line=exc.line, field=exc.field
        ) from None


def read_inputs(o: BackfillOptions) -> Inputs:
    """Read, check and sort the events; read the labels."""
    report = _read(read_events, o.events, o, o.rejects)
    if len(report.table) == 0:
        raise InputError(
            o.events,
            f"all {report.rows_read:,} rows were rejected (see {o.rejects}): nothing to score",
        )
    inputs = Inputs(sort_events(report.table), None, report.rows_read, report.rows_rejected)
    if o.labels is not None:
        labels = _read(read_labels, o.labels, o, o.label_rejects)
        inputs.labels = labels.table
        inputs.labels_read, inputs.labels_rejected = labels.rows_read, labels.rows_rejected
    return inputs


def label_columns(events: EventTable, labels: LabelTable | None) -> tuple[LabelColumns | None, int]:
    """Labels as the batch path takes them (event rows, -1 when unknown); how many are unknown."""
    if labels is None:
        return None, 0
    row = {event_id: i for i, event_id in enumerate(events.event_id)}
    rows = np.fromiter((row.get(e, -1) for e in labels.event_id), np.int64, len(labels))
    columns = LabelColumns(rows, np.asarray(labels.labeled_at_s), np.asarray(labels.is_fraud))
    return columns, int(np.count_nonzero(rows < 0))


def load_model(path: Path, fusion: Fusion) -> ModelSnapshot:
    """A saved snapshot, checked against this configuration's features, now used by ``fusion``."""
    check_readable(path)
    try:
        snapshot = ModelSnapshot.from_bytes(path.read_bytes())
        fusion.use(snapshot)
    except SnapshotError as exc:
        raise SnapshotError(f"{path}: {exc}") from None
    return snapshot


def save_model(path: Path, snapshot: ModelSnapshot) -> None:
    """Write a snapshot atomically."""
    out = AtomicOutput(path)
    try:
        out.stream.write(snapshot.to_bytes())
    except BaseException:
        out.abort()
        raise
    out.commit()


# --- the run -----------------------------------------------------------------------------------


def _run_parameters(o: BackfillOptions, settings: Settings) -> dict[str, object]:
    import hashlib

    return {
        "code": ckpt.code_version(),
        "config": repr(settings.scoring_config()),
        "label_horizon_s": settings.label_horizon_s,
        "default_region": settings.default_region,
        "secret": hashlib.sha256(settings.secret_bytes()).hexdigest(),
        "chunk_rows": o.chunk_rows,
        "frozen": o.model is not None,
    }


def _stale_parts(out: Path) -> list[Path]:
    """Temporary files a killed writer of ``out`` left behind (`AtomicOutput`'s names)."""
    pattern = re.compile(rf"^\.{re.escape(out.name)}\.[0-9a-f]{{32}}\.part$")
    return [p for p in out.parent.iterdir() if pattern.match(p.name)]


class BackfillRun:
    """One backfill: the stages in order, each skipped when the checkpoint already holds it."""

    def __init__(self, o: BackfillOptions, settings: Settings, progress: Progress) -> None:
        self.o = o
        self.settings = settings
        self.config = settings.scoring_config()
        self.progress = progress
        self.report = BackfillReport(out=o.out, frozen_model=o.model, saved_model=o.save_model)
        self.checkpoint: ckpt.Checkpoint | None = None
        self.fusion = Fusion(self.config)
        self.model: OnlineModel | None = None
        self.prepared: PreparedReplay | None = None
        self.learned: LearnedVersions | None = None

    def run(self) -> BackfillReport:
        _check_outputs(self.o)
        self.progress.stage("reading")
        if self.o.model is not None:
            load_model(self.o.model, self.fusion)
        else:
            features = model_features(self.fusion.layout)
            self.model = OnlineModel(features, self.config.learning_rate, self.config.l2)
        self._open_checkpoint()
        inputs = self._read()
        cols = self._plan(inputs.events)
        labels, self.report.labels_unknown_ids = label_columns(inputs.events, inputs.labels)
        chunks = range(0, len(cols), self.o.chunk_rows)
        self._learn(cols, labels, chunks)
        self._score_and_write(inputs.events, chunks)
        if self.o.save_model is not None:
            save_model(self.o.save_model, self.fusion.snapshot)
        if self.o.warm is not None:
            self._warm(cols, labels)
        if self.checkpoint is not None:
            self.checkpoint.clear()
        self.report.stage_s = self.progress.finish()
        self.report.wall_s = self.progress.wall_s()
        return self.report

    def _open_checkpoint(self) -> None:
        o = self.o
        if o.checkpoint is None:
            return
        files = [("events", o.events), ("labels", o.labels), ("model", o.model)]
        for _, path in files:
            if path is not None:
                check_readable(path)
        digest = ckpt.run_digest(files, _run_parameters(o, self.settings))
        self.checkpoint = ckpt.Checkpoint.open(o.checkpoint, digest)
        self.report.checkpoint = o.checkpoint
        if self.checkpoint.resumed:
            for stale in _stale_parts(o.out):
                stale.unlink(missing_ok=True)

    def _read(self) -> Inputs:
        o, r = self.o, self.report
        inputs = read_inputs(o)
        r.events_read, r.events_rejected = inputs.events_read, inputs.events_rejected
        r.labels_read, r.labels_rejected = inputs.labels_read, inputs.labels_rejected
        r.event_rejects = None if o.strict else o.rejects
        r.label_rejects = None if o.strict else o.label_rejects
        self.progress.total_rows = len(inputs.events)
        return inputs

    def _plan(self, events: EventTable) -> PlannedColumns:
        cp = self.checkpoint
        if cp is not None and cp.has("plan.npz"):
            cols = ckpt.plan_from_arrays(cp.load_arrays("plan.npz"))
            if len(cols) == len(events):
                return cols
        self.progress.stage("planning")
        hasher = KeyHasher(self.settings.secret_bytes())
        planner = ColumnPlanner(self.config, hasher, self.settings.default_region)
        fields = {f: getattr(events, f) for f in _FIELDS}
        cols = planner.plan(events.event_id, events.ts_s, events.type, events.amount, fields)
        if cp is not None:
            cp.save_arrays("plan.npz", ckpt.plan_arrays(cols))
        return cols

    def _prepare(self, cols: PlannedColumns, labels: LabelColumns | None) -> PreparedReplay:
        self.progress.stage("features")
        horizon = self.settings.label_horizon_s
        self.prepared = prepare_replay(cols, labels, self.config, record_ttl_s=horizon)
        return self.prepared

    def _learn(self, cols: PlannedColumns, labels: LabelColumns | None, chunks: range) -> None:
        """Features and learning, or what the checkpoint kept of them."""
        cp, r = self.checkpoint, self.report
        done = cp is not None and cp.has("learned.msgpack") and cp.has("learned.npz")
        missing = [i for i in range(len(chunks)) if cp is None or not cp.has(ckpt.chunk_name(i))]
        if done and cp is not None:
            self._restore_learned(cp)
            if missing:
                self._prepare(cols, labels)
                self.learned = LearnedVersions.from_arrays(cp.load_arrays("learned.npz"))
        else:
            prepared = self._prepare(cols, labels)
            self.progress.stage("learning")
            horizon = self.settings.label_horizon_s
            self.learned = learn_versions(
                prepared, cols, self.fusion, self.model, record_ttl_s=horizon
            )
            r.outcomes, r.labels_pending = dict(prepared.outcomes), prepared.labels_pending
            r.versions_published = self.learned.published
            if cp is not None:
                cp.save_arrays("learned.npz", self.learned.to_arrays())
                cp.save_msgpack("learned.msgpack", self._learned_meta())
        r.model_version = self.fusion.snapshot.version

    def _restore_learned(self, cp: ckpt.Checkpoint) -> None:
        r = self.report
        meta = cp.load_msgpack("learned.msgpack")
        try:
            self.fusion.use(ModelSnapshot.from_bytes(meta["snapshot"]))
            r.outcomes = {str(k): int(v) for k, v in meta["outcomes"].items()}
            r.labels_pending, r.versions_published = int(meta["pending"]), int(meta["published"])
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise cp.damaged("learned.msgpack", str(exc)) from None

    def _learned_meta(self) -> dict[str, object]:
        r = self.report
        return {
            "outcomes": r.outcomes,
            "pending": r.labels_pending,
            "published": r.versions_published,
            "snapshot": self.fusion.snapshot.to_bytes(),
        }

    def _chunk(self, number: int, start: int, stop: int) -> tuple[np.ndarray, list[str], list[str]]:
        """One chunk's scores: from the checkpoint when kept, else scored (and kept)."""
        cp, name = self.checkpoint, ckpt.chunk_name(number)
        if cp is not None and cp.has(name):
            try:
                scores = ckpt.chunk_from_payload(cp.load_msgpack(name), start, stop - start)
            except ValueError as exc:
                raise cp.damaged(name, str(exc)) from None
            self.report.chunks_reused += 1
            self.progress.rows(stop, reused=True)
            return scores
        assert self.prepared is not None and self.learned is not None
        scores = score_range(
            self.prepared, self.learned, self.fusion, start, stop,
            progress=lambda done: self.progress.rows(start + done),
        )  # fmt: skip
        if cp is not None:
            cp.save_msgpack(name, ckpt.chunk_payload(start, *scores))
        if FAULT_HOOK is not None:
            FAULT_HOOK(number)
        return scores

    def _score_and_write(self, events: EventTable, chunks: range) -> None:
        n = len(events)
        with_decision = events.has_current_decision()
        with_amount = not bool(np.all(np.isnan(events.amount)))
        self.progress.stage("scoring")
        with ScoreWriter.open(self.o.out, with_decision, with_amount) as writer:
            for number, start in enumerate(chunks):
                stop = min(start + self.o.chunk_rows, n)
                risk, decision, reasons = self._chunk(number, start, stop)
                self.progress.stage("writing")
                writer.write(
                    ScoreTable(
                        events.event_id[start:stop],
                        events.ts_s[start:stop],
                        risk,
                        decision,
                        reasons,
                        events.current_decision[start:stop] if with_decision else None,
                        events.amount[start:stop] if with_amount else None,
                    )
                )
                for d in decision:
                    self.report.decisions[d] = self.report.decisions.get(d, 0) + 1
                self.progress.stage("scoring")
            self.progress.stage("writing")  # closing the writer finishes and renames the file
        self.report.events_scored = n
        self.report.chunks_total = len(chunks)

    def _warm(self, cols: PlannedColumns, labels: LabelColumns | None) -> None:
        assert self.o.warm is not None
        self.progress.stage("warming")
        if self.prepared is not None:
            applications = self.prepared.applications
        elif labels is not None and len(labels.event_row):
            horizon = self.settings.label_horizon_s
            applications = schedule_labels(cols.ts_s, labels, horizon)[0]
        else:
            applications = []
        now_s, since_s = float(cols.ts_s[-1]), float(cols.ts_s[0])
        profiles = final_profiles(cols, applications, self.config, now_s=now_s)
        try:
            result = warm_redis(
                self.o.warm, self.settings, profiles, self.fusion.snapshot, since_s, now_s
            )
        except WarmError as exc:
            raise CommandError(str(exc)) from None
        self.report.warmed_profiles = result.profiles


def run_backfill(args: argparse.Namespace) -> int:
    """``emberscore backfill``: run, print the summary; returns the exit status."""
    options = BackfillOptions.from_args(args)
    settings = load_settings()
    stream = sys.stderr if options.show_progress and sys.stderr.isatty() else None
    progress = Progress(stream)
    try:
        report = BackfillRun(options, settings, progress).run()
    finally:
        progress.finish()  # clears the progress line before any message
    print(format_summary(report))
    return 0
