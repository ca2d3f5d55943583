"""Arguments, settings and input files of ``emberscore backfill``, checked before the replay.

Events are read and validated by `service.files` and sorted by time (a stable sort); labels are
read and mapped to the events' rows. A bad row stops the run with its line, field and reason,
and the message says how many rows are bad and how to go on without them (``--rejects``);
``--strict`` stops at the first one without more ado. Output paths and the model file are
checked before any time is spent on the replay.
"""

from __future__ import annotations

import argparse
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import numpy as np
from pydantic import ValidationError

from scoring.batch import LabelColumns
from scoring.batch_plan import ColumnPlanner, PlannedColumns
from scoring.fusion import Fusion, ModelSnapshot, SnapshotError
from service.cli import CommandError
from service.config import Settings, SettingsError
from service.files import read_events, read_labels, sort_events
from service.files_base import AtomicOutput, InputError, check_readable, format_of
from service.tables import EventTable, LabelTable

REJECTS_HINT = "to list them in a file and go on without them, run again with --rejects FILE"


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


def check_outputs(o: BackfillOptions) -> None:
    """Refuse output paths (and a Redis URL) that cannot work before any time is spent."""
    format_of(o.out)
    if o.warm is not None and urlsplit(o.warm).scheme not in ("redis", "rediss", "unix"):
        raise CommandError(
            "--warm needs a Redis URL: redis://host:port/db, rediss://... or unix://"
        )
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
    """Run a reader; a bad row's message says how many rows are bad and how to go on."""
    rejects = None if o.strict else reject_path
    try:
        return reader(path, strict=o.strict, reject_path=rejects)
    except InputError as exc:
        if exc.line is None or o.strict or rejects is not None:
            raise
        bad = _rows_to_reject(reader, path)
        if bad is None:  # not a matter of rows: setting rows aside would not help
            raise
        hint = f"; {bad:,} bad rows in all: {REJECTS_HINT}" if bad > 1 else f"; {REJECTS_HINT}"
        raise InputError(exc.path, exc.reason + hint, line=exc.line, field=exc.field) from None


def _rows_to_reject(reader: Callable[..., Any], path: Path) -> int | None:
    """How many rows a run with ``--rejects`` would set aside; None if it would fail as well."""
    with tempfile.TemporaryDirectory(prefix="emberscore-") as folder:
        try:
            report = reader(path, strict=False, reject_path=Path(folder) / "rejects.csv")
        except InputError:
            return None
    return int(report.rows_rejected)


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


IDENTIFIER_FIELDS = ("account_id", "device_id", "ip", "phone", "email")


def plan_events(planner: ColumnPlanner, events: EventTable) -> PlannedColumns:
    """The batch path's planned columns of a table of events (normalised, hashed, in order)."""
    fields = {f: getattr(events, f) for f in IDENTIFIER_FIELDS}
    return planner.plan(events.event_id, events.ts_s, events.type, events.amount, fields)


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
