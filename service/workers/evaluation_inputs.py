"""Inputs of the evaluation and the shadow report: scores lined up with labels, the as-of date,
the segments file, and the rules' decision rank.

Labels join on `event_id`. A label naming no scored event is counted, never silently dropped.
When several labels name one event, the one with the latest `labeled_at` counts (a correction).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import UTC, date, datetime, time
from pathlib import Path

import numpy as np
import numpy.typing as npt

from scoring import evaluate as ev
from service.files_base import InputError, check_readable
from service.tables import LabelTable, ScoreTable

NO_SEGMENT = "(no segment)"


class EvaluationError(ValueError):
    """Input that cannot be evaluated; the message says what to fix."""


@dataclass(frozen=True)
class LabelJoin:
    """Labels lined up with the score rows.

    `is_fraud[i]` is True when row i has a counted fraud label; `labelled[i]` when it has any
    counted label. `unknown_ids` counts labels whose event_id is not among the scores,
    `after_as_of` labels left out because they arrived after `as_of`, `superseded` labels
    replaced by a later label for the same event.
    """

    is_fraud: npt.NDArray[np.bool_]
    labelled: npt.NDArray[np.bool_]
    unknown_ids: int
    after_as_of: int
    superseded: int


def score_index(scores: ScoreTable) -> dict[str, int]:
    """Row of each event_id; duplicate ids are an error (a scores file has one row per event)."""
    index = {event_id: row for row, event_id in enumerate(scores.event_id)}
    if len(index) != len(scores):
        raise EvaluationError(
            f"the scores hold {len(scores) - len(index)} repeated event_id value(s); "
            "each event must be scored once (drop the repeats and run again)"
        )
    return index


def join_labels(
    scores: ScoreTable,
    labels: LabelTable | None,
    *,
    as_of_s: float | None = None,
    index: dict[str, int] | None = None,
) -> LabelJoin:
    """Line labels up with score rows, applying `as_of_s` and latest-label-wins."""
    n = len(scores)
    is_fraud, labelled = np.zeros(n, dtype=np.bool_), np.zeros(n, dtype=np.bool_)
    if labels is None or len(labels) == 0:
        return LabelJoin(is_fraud, labelled, 0, 0, 0)
    rows = score_index(scores) if index is None else index
    known = np.ones(len(labels), dtype=np.bool_)
    if as_of_s is not None:
        known = labels.labeled_at_s <= as_of_s
    unknown = superseded = 0
    for i in np.argsort(labels.labeled_at_s, kind="stable"):
        row = rows.get(labels.event_id[i])
        if row is None:
            unknown += 1
        elif known[i]:
            superseded += int(labelled[row])
            labelled[row], is_fraud[row] = True, bool(labels.is_fraud[i])
    after = int(np.count_nonzero(~known)) - _unknown_after(labels, rows, known)
    return LabelJoin(is_fraud, labelled, unknown, after, superseded)


def _unknown_after(labels: LabelTable, rows: dict[str, int], known: npt.NDArray[np.bool_]) -> int:
    """Labels both late and of an unknown event: counted once, as unknown."""
    return sum(1 for i in np.flatnonzero(~known) if labels.event_id[i] not in rows)


def parse_as_of(text: str) -> float:
    """`--as-of` value to epoch seconds: an ISO 8601 date (the end of that UTC day counts, so
    labels known on that date are in) or a date-time with a zone."""
    try:
        if len(text.strip()) == 10:
            day = date.fromisoformat(text.strip())
            return datetime.combine(day, time.max, tzinfo=UTC).timestamp()
        moment = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise EvaluationError(
            f"--as-of {text!r} is not a date (2024-05-31) or a date-time with a zone "
            "(2024-05-31T12:00:00Z)"
        ) from None
    if moment.tzinfo is None:
        raise EvaluationError(f"--as-of {text!r} has no time zone: add Z or +hh:mm")
    return moment.timestamp()


def read_segments(path: Path | str) -> dict[str, str]:
    """A CSV `event_id,segment` (header required) as a mapping; a repeated event_id is an error.

    An empty segment becomes NO_SEGMENT. Bad files raise `InputError` naming path and line.
    """
    try:
        with check_readable(path).open(newline="", encoding="utf-8") as handle:
            return _segments_from(path, csv.DictReader(handle))
    except UnicodeDecodeError:
        raise InputError(path, "is not UTF-8 text: save the segments as a UTF-8 CSV") from None
    except csv.Error as error:
        raise InputError(path, f"is not a readable CSV ({error})") from None


def _segments_from(path: Path | str, reader: csv.DictReader[str]) -> dict[str, str]:
    missing = {"event_id", "segment"} - set(reader.fieldnames or ())
    if missing:
        raise InputError(
            path,
            "the header must name the columns event_id and segment "
            f"(missing: {', '.join(sorted(missing))})",
            line=1,
        )
    segments: dict[str, str] = {}
    for record in reader:
        event_id = (record["event_id"] or "").strip()
        if not event_id or event_id in segments:
            why = (
                "event_id is empty" if not event_id else "this event_id appeared on an earlier line"
            )
            raise InputError(path, why, line=reader.line_num, field="event_id")
        segments[event_id] = (record["segment"] or "").strip() or NO_SEGMENT
    return segments


def checked_risk(scores: ScoreTable) -> npt.NDArray[np.float64]:
    """The risk column, with a message naming the scores when it holds a non-number."""
    if len(scores) == 0:
        raise EvaluationError("the scores hold no events: nothing to evaluate")
    try:
        return ev.as_risk(scores.risk)
    except ValueError as error:
        raise EvaluationError(f"scores: {error}") from None


def rules_rank(scores: ScoreTable) -> npt.NDArray[np.int8] | None:
    """The rules' decision rank (deny 2 > review 1 > allow 0), or None without `current_decision`.

    Rows whose current_decision is missing or unreadable rank as allow (the rules did not stop
    them); `EvaluationResult.rules_missing` counts them.
    """
    if scores.current_decision is None or all(d is None for d in scores.current_decision):
        return None
    return np.maximum(ev.decision_codes(scores.current_decision), 0).astype(np.int8)


def missing_decisions(scores: ScoreTable) -> int:
    """Rows whose current_decision is missing or not a known decision."""
    codes = ev.decision_codes(scores.current_decision or [])
    return int(np.count_nonzero(codes < 0))
