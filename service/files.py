"""Events, labels and scores files (DESIGN.md "Interfaces"): read, validate, sort and write.

The format follows the extension: ``.csv``, ``.jsonl`` or ``.ndjson``, ``.parquet``, and the
gzip forms ``.csv.gz`` and ``.jsonl.gz``. Readers check every row with vectorised code and
return a `ReadReport`; a bad row either raises `InputError` naming its line and field, or goes
to a reject file (``line,event_id,field,reason``, never a raw identifier) when one is asked for
and `strict` is off. Writers write to a temporary file and rename it, so an error never leaves
a partial file behind.

Columns (absent optional columns read as empty):

* events: ``event_id, ts, type`` required; ``account_id, ip, device_id, phone, email`` (at
  least one of them), ``amount`` and ``current_decision`` optional.
* labels: ``event_id, labeled_at, is_fraud`` (1/0 or true/false). An empty labels file is
  valid: it means no labels yet. An empty events file is an error.
* scores: ``event_id, ts, risk, decision, reasons``, optional ``current_decision, amount``.

Times are read as ISO 8601 with a zone or epoch seconds (see `service.files_times`) and written
as ISO 8601 UTC with milliseconds, so times round-trip exactly at millisecond precision.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TypeVar, cast

import numpy as np
import pyarrow as pa

from service.files_base import (
    ColumnTypeError,
    InputError,
    ReadReport,
    RowProblem,
    settle,
)
from service.files_columns import (
    amounts,
    choice,
    event_ids,
    flags,
    kept,
    text_list,
    times,
    unit_interval,
)
from service.files_read import Columns, RawRows, read_rows
from service.files_write import ScoreWriter, events_arrow, labels_arrow, write_whole
from service.tables import DECISIONS, IDENTIFIER_FIELDS, EventTable, LabelTable, ScoreTable

__all__ = [
    "EVENT_TYPES",
    "InputError",
    "ReadReport",
    "ScoreWriter",
    "read_events",
    "read_labels",
    "read_scores",
    "sort_events",
    "write_events",
    "write_labels",
    "write_scores",
]

EVENT_TYPES = ("signup", "login", "checkout")
V = TypeVar("V")

EVENTS = Columns(
    "events",
    required=("event_id", "ts", "type"),
    optional=(*IDENTIFIER_FIELDS, "amount", "current_decision"),
    text=("event_id", "type", *IDENTIFIER_FIELDS, "current_decision"),
    numeric=("amount",),
)
LABELS = Columns(
    "labels",
    required=("event_id", "labeled_at", "is_fraud"),
    text=("event_id",),
    numeric=("is_fraud",),
)
SCORES = Columns(
    "scores",
    required=("event_id", "ts", "risk", "decision", "reasons"),
    optional=("current_decision", "amount"),
    text=("event_id", "decision", "reasons", "current_decision"),
    numeric=("risk", "amount"),
)


@contextmanager
def _column(path: str | Path, field: str) -> Iterator[None]:
    """Turn a whole-column type problem into an InputError naming the file and the field."""
    try:
        yield
    except ColumnTypeError as exc:
        raise InputError(path, f"the column {exc}", field=field) from None


class _Checks:
    """Runs column checks in column order, gathering their problems (first problem first)."""

    def __init__(self, path: str | Path, raw: RawRows) -> None:
        self.path = path
        self.lines = raw.lines
        self.problems = list(raw.problems)

    def run(self, field: str, check: Callable[[], tuple[V, list[RowProblem]]]) -> V:
        with _column(self.path, field):
            values, found = check()
        self.problems += found
        return values

    def text(
        self, field: str, values: pa.Array | None, keep: np.ndarray | None
    ) -> list[str | None]:
        with _column(self.path, field):
            return text_list(values, keep, len(self.lines) if keep is None else int(keep.sum()))

    def settle(self, ids: list[str | None], *, strict: bool, reject_path: str | Path | None) -> int:
        """Fill in each problem's event id, then raise or write the reject file."""
        lines = self.lines
        problems = []
        for p in self.problems:
            i = int(np.searchsorted(lines, p.line))  # lines ascend in every format
            event_id = ids[i] if i < len(lines) and lines[i] == p.line else None
            problems.append(RowProblem(p.line, p.field, p.reason, p.shown, event_id or ""))
        self.problems = problems
        return settle(self.path, problems, strict=strict, reject_path=reject_path)

    def keep(self) -> np.ndarray | None:
        """Which rows to keep, or None to keep them all (the usual case: no copies)."""
        if not self.problems:
            return None
        bad = np.fromiter((p.line for p in self.problems), np.int64, len(self.problems))
        return ~np.isin(self.lines, bad)


def _pick(values: np.ndarray, keep: np.ndarray | None) -> np.ndarray:
    return values if keep is None else values[keep]


def _kept(values: list[str | None], keep: np.ndarray | None) -> list[str]:
    """Validated text (never None) at the kept rows."""
    return cast(list[str], kept(values, keep))


# --- events ------------------------------------------------------------------------------------


def read_events(
    path: str | Path, *, strict: bool = False, reject_path: str | Path | None = None
) -> ReadReport[EventTable]:
    """Read and check an events file; rows stay in file order (see `sort_events`).

    Bad rows raise `InputError` unless `reject_path` is given and `strict` is off, in which
    case they are written there and left out of the table.

    >>> import tempfile
    >>> path = Path(tempfile.mkdtemp()) / "events.csv"
    >>> _ = path.write_text("event_id,ts,type,ip\\ne1,2026-09-01T10:00:00Z,login,192.0.2.7\\n")
    >>> report = read_events(path)
    >>> report.rows_read, report.table.ts_s.tolist(), report.table.type
    (1, [1788256800.0], ['login'])
    """
    raw = read_rows(path, EVENTS)
    if raw.empty:
        raise InputError(path, "the file is empty: no events to read")
    if raw.rows_read == 0:
        raise InputError(path, "has column names but no rows: no events to read")
    report_path = None if reject_path is None else Path(reject_path)
    if len(raw.lines) == 0:  # every row unparsable: nothing to check column by column
        rejected = settle(path, raw.problems, strict=strict, reject_path=reject_path)
        return ReadReport(_no_events(), raw.rows_read, rejected, report_path)
    if not any(f in raw.columns for f in IDENTIFIER_FIELDS):
        raise InputError(path, f"no identifier column: give one of {', '.join(IDENTIFIER_FIELDS)}")
    checks = _Checks(path, raw)
    columns = _check_events(checks, raw.columns)
    rejected = checks.settle(columns.ids, strict=strict, reject_path=reject_path)
    table = _events_kept(checks, raw.columns, columns)
    return ReadReport(table, raw.rows_read, rejected, report_path)


def _no_events() -> EventTable:
    none: list[str | None] = []
    return EventTable([], np.zeros(0), [], none, none, none, none, none, np.zeros(0), none)


@dataclass
class _EventColumns:
    """The checked columns other than identifiers, before bad rows are left out."""

    ids: list[str | None]
    ts_s: np.ndarray
    kinds: pa.Array
    amount: np.ndarray
    decisions: pa.Array


def _check_events(checks: _Checks, c: dict[str, pa.Array]) -> _EventColumns:
    lines = checks.lines
    return _EventColumns(  # keyword arguments run in order: problems come in column order
        ids=checks.run("event_id", lambda: event_ids(c["event_id"], lines)),
        ts_s=checks.run("ts", lambda: times(c["ts"], lines, "ts")),
        kinds=checks.run(
            "type", lambda: choice(c["type"], lines, "type", EVENT_TYPES, required=True)
        ),
        amount=checks.run("amount", lambda: amounts(c.get("amount"), lines)),
        decisions=checks.run("current_decision", lambda: _decisions(c, lines, "current_decision")),
    )


def _events_kept(checks: _Checks, c: dict[str, pa.Array], columns: _EventColumns) -> EventTable:
    keep = checks.keep()
    identifiers = {f: checks.text(f, c.get(f), keep) for f in IDENTIFIER_FIELDS}
    return EventTable(
        event_id=_kept(columns.ids, keep),
        ts_s=_pick(columns.ts_s, keep),
        type=_kept(checks.text("type", columns.kinds, keep), None),
        amount=_pick(columns.amount, keep),
        current_decision=checks.text("current_decision", columns.decisions, keep),
        line=_pick(checks.lines, keep),
        **identifiers,
    )


def write_events(path: str | Path, table: EventTable) -> None:
    """Write events in the format of the extension (``current_decision`` only if any is set)."""
    write_whole(path, lambda text: events_arrow(table, text))


def sort_events(table: EventTable) -> EventTable:
    """Events by time, ties kept in input order (a stable sort); `table` itself if sorted.

    >>> t = EventTable(["a", "b", "c"], np.array([3.0, 1.0, 1.0]), ["login"] * 3,
    ...                [None] * 3, [None] * 3, [None] * 3, [None] * 3, [None] * 3,
    ...                np.full(3, np.nan), [None] * 3)
    >>> sort_events(t).event_id
    ['b', 'c', 'a']
    """
    ts = np.asarray(table.ts_s, dtype=np.float64)
    if len(ts) < 2 or bool(np.all(ts[1:] >= ts[:-1])):
        return table
    order = np.argsort(ts, kind="stable")
    at = order.tolist()  # Python ints index lists fastest

    def pick(values: list[str | None]) -> list[str | None]:
        return [values[i] for i in at]

    return EventTable(
        event_id=[table.event_id[i] for i in at],
        ts_s=ts[order],
        type=[table.type[i] for i in at],
        account_id=pick(table.account_id),
        ip=pick(table.ip),
        device_id=pick(table.device_id),
        phone=pick(table.phone),
        email=pick(table.email),
        amount=np.asarray(table.amount)[order],
        current_decision=pick(table.current_decision),
        line=np.asarray(table.line)[order],
    )


# --- labels ------------------------------------------------------------------------------------


def read_labels(
    path: str | Path, *, strict: bool = False, reject_path: str | Path | None = None
) -> ReadReport[LabelTable]:
    """Read and check a labels file; an empty file means no labels yet (an empty table).

    An event labelled twice keeps its first label in file order; later ones are rejected.
    """
    raw = read_rows(path, LABELS)
    report_path = None if reject_path is None else Path(reject_path)
    if len(raw.lines) == 0:  # no labels yet, or every row unparsable
        rejected = settle(path, raw.problems, strict=strict, reject_path=reject_path)
        empty = LabelTable([], np.zeros(0), np.zeros(0, dtype=bool))
        return ReadReport(empty, raw.rows_read, rejected, report_path)
    c, lines, checks = raw.columns, raw.lines, _Checks(path, raw)
    ids = checks.run("event_id", lambda: event_ids(c["event_id"], lines))
    at = checks.run("labeled_at", lambda: times(c["labeled_at"], lines, "labeled_at"))
    fraud = checks.run("is_fraud", lambda: flags(c["is_fraud"], lines, "is_fraud"))
    rejected = checks.settle(ids, strict=strict, reject_path=reject_path)
    keep = checks.keep()
    table = LabelTable(_kept(ids, keep), _pick(at, keep), _pick(fraud, keep), _pick(lines, keep))
    return ReadReport(table, raw.rows_read, rejected, report_path)


def write_labels(path: str | Path, table: LabelTable) -> None:
    """Write labels in the format of the extension (``is_fraud`` as 1/0 in text formats)."""
    write_whole(path, lambda text: labels_arrow(table, text))


# --- scores ------------------------------------------------------------------------------------


def read_scores(path: str | Path) -> ScoreTable:
    """Read a scores file (as written by `write_scores`); any bad row raises `InputError`."""
    raw = read_rows(path, SCORES)
    c, lines, checks = raw.columns, raw.lines, _Checks(path, raw)
    if len(lines) == 0:
        settle(path, raw.problems, strict=True, reject_path=None)
        return ScoreTable([], np.zeros(0), np.zeros(0), [], [],
                          [] if "current_decision" in c else None,
                          np.zeros(0) if "amount" in c else None)  # fmt: skip
    ids = checks.run("event_id", lambda: event_ids(c["event_id"], lines))
    ts_s = checks.run("ts", lambda: times(c["ts"], lines, "ts"))
    risk = checks.run("risk", lambda: unit_interval(c["risk"], lines, "risk"))
    decision = checks.run("decision", lambda: _decisions(c, lines, "decision"))
    current = checks.run("current_decision", lambda: _decisions(c, lines, "current_decision"))
    amount = checks.run("amount", lambda: amounts(c.get("amount"), lines))
    reasons = checks.text("reasons", c["reasons"], None)
    checks.settle(ids, strict=True, reject_path=None)
    return ScoreTable(
        event_id=_kept(ids, None),
        ts_s=ts_s,
        risk=risk,
        decision=_kept(checks.text("decision", decision, None), None),
        reasons=["" if r is None else r for r in reasons],
        current_decision=current.to_pylist() if "current_decision" in c else None,
        amount=amount if "amount" in c else None,
    )


def _decisions(
    c: dict[str, pa.Array], lines: np.ndarray, field: str
) -> tuple[pa.Array, list[RowProblem]]:
    """A decision column: required for the score's own, optional for the rules' in force."""
    return choice(c.get(field), lines, field, DECISIONS, required=field == "decision")


def write_scores(path: str | Path, table: ScoreTable) -> None:
    """Write scores at once: the same bytes as `ScoreWriter` fed in chunks."""
    with ScoreWriter.open(
        path,
        with_current_decision=table.current_decision is not None,
        with_amount=table.amount is not None,
    ) as writer:
        writer.write(table)
