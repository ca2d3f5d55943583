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
import hashlib
import re
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np

from scoring.batch import LabelColumns, PreparedReplay, prepare_replay, schedule_labels
from scoring.batch_plan import ColumnPlanner, PlannedColumns
from scoring.batch_state import LearnedVersions, final_profiles, learn_versions, score_range
from scoring.fusion import Fusion, ModelSnapshot, OnlineModel, model_features
from scoring.hashing import KeyHasher
from service.cli import CommandError
from service.config import Settings
from service.files import ScoreWriter
from service.files_base import check_readable
from service.tables import EventTable, ScoreTable
from service.workers import backfill_checkpoint as ckpt
from service.workers.backfill_inputs import (
    BackfillOptions,
    Inputs,
    check_outputs,
    label_columns,
    load_model,
    load_settings,
    plan_events,
    read_inputs,
    save_model,
)
from service.workers.backfill_progress import Progress
from service.workers.backfill_report import BackfillReport, format_summary
from service.workers.backfill_warm import WarmError, warm_redis

FAULT_HOOK: Callable[[int], None] | None = None
"""Called with the chunk number after each chunk is scored (and kept): tests inject faults here."""

# --- the run -----------------------------------------------------------------------------------


def _run_parameters(o: BackfillOptions, settings: Settings) -> dict[str, object]:
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
        check_outputs(self.o)
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
        self.report.wall_s = self.progress.wall_s()  # end to end: reading to the scores file
        if self.o.warm is not None:
            self._warm(cols, labels)
        if self.checkpoint is not None:
            self.checkpoint.clear()
        self.report.stage_s = self.progress.finish()
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
        cols = plan_events(planner, events)
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
        assert self.prepared is not None
        assert self.learned is not None
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
        self.progress.rows(0)  # the speed counts from here
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
    except OSError as exc:  # a full disk, a vanished folder: the system's words, no traceback
        if isinstance(exc, FileNotFoundError | IsADirectoryError | PermissionError):
            raise  # the command prints these itself
        where = f"{exc.filename}: " if exc.filename else ""
        raise CommandError(f"{where}{exc.strerror or exc}") from None
    finally:
        progress.finish()  # clears the progress line before any message
    print(format_summary(report))
    return 0
