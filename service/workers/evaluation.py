"""The `evaluate` command's work: join scores with labels, compute the figures, print a table.

The maths is `scoring.evaluate`; the joins and small inputs are `evaluation_inputs`; this module
computes the figures for both sides and formats them. Label semantics: an event without a label
counts as not fraud (common practice, no source). With `as_of`, only labels with
`labeled_at <= as_of` count, as they would have been known that day.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import numpy.typing as npt

from scoring import evaluate as ev
from service import files
from service.tables import LabelTable, ScoreTable
from service.workers.evaluation_inputs import (
    NO_SEGMENT,
    EvaluationError,
    LabelJoin,
    checked_risk,
    join_labels,
    missing_decisions,
    parse_as_of,
    read_segments,
    rules_rank,
    score_index,
)

__all__ = [
    "DEFAULT_ALERT_RATES",
    "DEFAULT_TOP_K",
    "EvaluationError",
    "EvaluationResult",
    "LabelJoin",
    "SegmentRow",
    "SideFigures",
    "evaluate_files",
    "evaluate_tables",
    "format_table",
    "parse_as_of",
    "read_segments",
]

DEFAULT_ALERT_RATES = (0.005, 0.01, 0.02)
DEFAULT_TOP_K = 100
SEGMENT_ALERT_RATE = 0.01


@dataclass(frozen=True)
class SideFigures:
    """Figures for one ranking: emberscore's risk, or the rules' decision rank.

    `at_rates` use the "share" tie rule (exactly ceil(rate x n) alerts; tied events share the
    last places), so both sides alert the same number of events. `deployed` is the side's own
    decisions: alert = review or deny.
    """

    name: str
    average_precision: float
    roc_auc: float
    at_rates: list[ev.AlertResult]
    top_k: ev.DailyPrecision
    deployed: ev.AlertResult


@dataclass(frozen=True)
class SegmentRow:
    """Catch rate of one segment's fraud at the segment alert rate, for each side."""

    segment: str
    events: int
    fraud: int
    ours: float
    rules: float | None
    ours_alerted: float = float("nan")
    rules_alerted: float | None = None


@dataclass(frozen=True)
class EvaluationResult:
    """Everything `format_table` prints."""

    events: int
    labelled: int
    fraud: int
    labels: LabelJoin
    as_of_s: float | None
    top_k: int
    ours: SideFigures
    rules: SideFigures | None
    segments: list[SegmentRow] | None
    segment_rate: float
    segment_unknown_ids: int
    rules_missing: int
    labels_rejected: int = 0
    calibration: tuple[ev.CalibrationBand, ...] = ()
    brier: float = float("nan")


def side_figures(
    name: str,
    risk: npt.NDArray[np.float64],
    alerted: npt.NDArray[np.bool_],
    is_fraud: npt.NDArray[np.bool_],
    day: npt.NDArray[np.int64],
    *,
    alert_rates: Sequence[float],
    top_k: int,
) -> SideFigures:
    """All ranking figures of one side. `alerted` is its own review-or-deny set."""
    deployed = ev.at_threshold(alerted.astype(np.float64), is_fraud, 1.0)
    return SideFigures(
        name=name,
        average_precision=ev.average_precision(risk, is_fraud),
        roc_auc=ev.roc_auc(risk, is_fraud),
        at_rates=[ev.at_alert_rate(risk, is_fraud, r, ties="share") for r in alert_rates],
        top_k=ev.precision_at_k_per_day(risk, is_fraud, day, top_k),
        deployed=deployed,
    )


def evaluate_tables(
    scores: ScoreTable,
    labels: LabelTable | None,
    *,
    alert_rates: Sequence[float] = DEFAULT_ALERT_RATES,
    top_k: int = DEFAULT_TOP_K,
    as_of_s: float | None = None,
    segments: dict[str, str] | None = None,
) -> EvaluationResult:
    """The figures of `evaluate_files`, from tables in memory."""
    risk = checked_risk(scores)
    index = score_index(scores)
    joined = join_labels(scores, labels, as_of_s=as_of_s, index=index)
    day = ev.utc_day(scores.ts_s)
    fraud = joined.is_fraud
    ours_alerted = ev.decision_codes(scores.decision) >= 1
    ours = side_figures(
        "emberscore", risk, ours_alerted, fraud, day, alert_rates=alert_rates, top_k=top_k
    )
    rank = rules_rank(scores)
    rules = None
    if rank is not None:
        rules = side_figures(
            "rules",
            rank.astype(np.float64),
            rank >= 1,
            fraud,
            day,
            alert_rates=alert_rates,
            top_k=top_k,
        )
    segment_rows, unknown_segments = None, 0
    if segments is not None:
        segment_rows = segment_table(scores, risk, rank, fraud, segments)
        unknown_segments = sum(1 for event_id in segments if event_id not in index)
    return EvaluationResult(
        events=len(scores),
        labelled=int(joined.labelled.sum()),
        fraud=int(fraud.sum()),
        labels=joined,
        as_of_s=as_of_s,
        top_k=top_k,
        ours=ours,
        rules=rules,
        segments=segment_rows,
        segment_rate=SEGMENT_ALERT_RATE,
        segment_unknown_ids=unknown_segments,
        rules_missing=0 if rank is None else missing_decisions(scores),
        calibration=tuple(ev.calibration_table(risk, fraud)),
        brier=ev.brier_score(risk, fraud),
    )


def segment_table(
    scores: ScoreTable,
    risk: npt.NDArray[np.float64],
    rank: npt.NDArray[np.int8] | None,
    fraud: npt.NDArray[np.bool_],
    segments: dict[str, str],
) -> list[SegmentRow]:
    """Catch rate per segment when each side alerts the top SEGMENT_ALERT_RATE of events."""
    names = [segments.get(event_id, NO_SEGMENT) for event_id in scores.event_id]
    k = ev.alert_count(SEGMENT_ALERT_RATE, len(scores))
    ours = ev.segment_catch_rates(ev.alert_weights(risk, k), fraud, names)
    theirs = (
        None if rank is None else ev.segment_catch_rates(ev.alert_weights(rank, k), fraud, names)
    )
    return [
        SegmentRow(
            segment=row.segment,
            events=row.events,
            fraud=row.fraud,
            ours=row.catch_rate,
            rules=None if theirs is None else theirs[i].catch_rate,
            ours_alerted=row.alerted_share,
            rules_alerted=None if theirs is None else theirs[i].alerted_share,
        )
        for i, row in enumerate(ours)
    ]


def evaluate_files(
    scores_path: Path | str,
    labels_path: Path | str,
    *,
    alert_rates: Sequence[float] = DEFAULT_ALERT_RATES,
    top_k: int = DEFAULT_TOP_K,
    as_of: str | float | None = None,
    segments_path: Path | str | None = None,
    labels_reject_path: Path | str | None = None,
) -> EvaluationResult:
    """Read a scores file and a labels file (CSV, JSON Lines or Parquet) and evaluate.

    `as_of`: epoch seconds, or text as `parse_as_of` reads it. Bad files raise
    `service.files.InputError`; inconsistent content raises `EvaluationError`. With
    `labels_reject_path`, bad label rows go to that reject file and are counted instead.
    """
    as_of_s = parse_as_of(as_of) if isinstance(as_of, str) else as_of
    scores = files.read_scores(scores_path)
    read = files.read_labels(labels_path, reject_path=labels_reject_path)
    segments = read_segments(segments_path) if segments_path is not None else None
    result = evaluate_tables(
        scores,
        read.table,
        alert_rates=alert_rates,
        top_k=top_k,
        as_of_s=as_of_s,
        segments=segments,
    )
    return replace(result, labels_rejected=read.rows_rejected)


def _num(value: float, digits: int = 3) -> str:
    return "n/a" if math.isnan(value) else f"{value:.{digits}f}"


def _pct(value: float) -> str:
    return "n/a" if math.isnan(value) else f"{100 * value:.1f}%"


def _row(label: str, ours: str, rules: str | None) -> str:
    return f"  {label:<44}{ours:>12}" + ("" if rules is None else f"{rules:>12}")


def _counts_block(result: EvaluationResult) -> list[str]:
    joined = result.labels
    when = ""
    if result.as_of_s is not None:
        when = (
            f" (labels known by {datetime.fromtimestamp(result.as_of_s, UTC):%Y-%m-%d %H:%M} UTC)"
        )
    lines = [
        "emberscore evaluation",
        f"  events scored{'':<30}{result.events:>12,}",
        f"  events with a label{'':<25}{result.labelled:>12,}{when}",
        f"  labelled fraud{'':<30}{result.fraud:>12,}   (unlabelled events count as not fraud)",
    ]
    extra = [
        ("labels for event_ids not in the scores", joined.unknown_ids, "left out"),
        ("labels that arrived after --as-of", joined.after_as_of, "left out"),
        ("labels replaced by a later label", joined.superseded, "latest counts"),
        ("label rows rejected by the reader", result.labels_rejected, "see the reject file"),
        ("events without current_decision", result.rules_missing, "rules count them as allow"),
    ]
    lines += [f"  {text:<44}{count:>12,}   ({why})" for text, count, why in extra if count]
    return lines


Pick = Callable[[SideFigures], str]


def _at_rate_pick(i: int, field: str) -> Pick:
    return lambda side: _pct(getattr(side.at_rates[i], field))


def _side_specs(ours: SideFigures, top_k: int) -> list[tuple[str, Pick]]:
    specs: list[tuple[str, Pick]] = [
        ("average precision", lambda s: _num(s.average_precision)),
        ("ROC AUC", lambda s: _num(s.roc_auc)),
    ]
    for i, at in enumerate(ours.at_rates):
        head = f"top {_pct(at.requested_rate or 0.0)} alerted ({int(at.alerts):,})"
        specs.append((f"{head:<30}recall", _at_rate_pick(i, "recall")))
        specs.append((f"{'':<30}precision", _at_rate_pick(i, "precision")))
    own = "own decisions (review+deny)"
    specs.append((f"{own:<30}alert rate", lambda s: _pct(s.deployed.alert_rate)))
    specs.append((f"{'':<30}recall", lambda s: _pct(s.deployed.recall)))
    specs.append((f"{'':<30}precision", lambda s: _pct(s.deployed.precision)))
    head = f"top {top_k} per day ({len(ours.top_k.days)} days)"
    specs.append((f"{head:<30}mean precision", lambda s: _pct(s.top_k.mean)))
    return specs


def _side_rows(ours: SideFigures, rules: SideFigures | None, top_k: int) -> list[str]:
    lines = ["", _row("", "emberscore", None if rules is None else "rules")]
    for label, pick in _side_specs(ours, top_k):
        lines.append(_row(label, pick(ours), None if rules is None else pick(rules)))
    return lines


def _segment_rows(result: EvaluationResult) -> list[str]:
    if result.segments is None:
        return []
    with_rules = result.rules is not None
    rate = _pct(result.segment_rate)
    lines = [
        "",
        f"per segment, when each side alerts its top {rate} of events:",
        "  alerted = share of the segment's events alerted (catch rate of an attack segment,",
        "  false alarms of a benign one); caught = share of its labelled fraud alerted",
        f"  {'segment':<24}{'events':>9}{'fraud':>7}"
        + f"{'alerted':>10}{'caught':>9}"
        + (f"{'alerted':>10}{'caught':>9}" if with_rules else ""),
        f"  {'':<40}{'--- emberscore ---':>19}"
        + (f"{'----- rules -----':>19}" if with_rules else ""),
    ]
    for row in result.segments:
        line = (
            f"  {row.segment[:24]:<24}{row.events:>9,}{row.fraud:>7,}"
            f"{_pct(row.ours_alerted):>10}{_pct(row.ours):>9}"
        )
        if row.rules is not None and row.rules_alerted is not None:
            line += f"{_pct(row.rules_alerted):>10}{_pct(row.rules):>9}"
        lines.append(line)
    if result.segment_unknown_ids:
        lines.append(f"  ({result.segment_unknown_ids:,} segment rows name unknown event_ids)")
    return lines


def _calibration_rows(result: EvaluationResult) -> list[str]:
    if not result.calibration:
        return []
    lines = [
        "",
        "calibration of emberscore's risk against labelled fraud (a lower bound where labels",
        f"miss some fraud); Brier score {result.brier:.4f}",
        f"  {'risk band':<18}{'events':>10}{'mean risk':>12}{'labelled fraud':>16}",
    ]
    for band in result.calibration:
        name = f"{band.low:.3f} - {band.high:.3f}"
        lines.append(
            f"  {name:<18}{band.events:>10,}{band.mean_risk:>12.4f}{band.fraud_share:>16.4f}"
        )
    return lines


NOTES = (
    "notes:",
    "  An alert rate alerts exactly ceil(rate x events) events; events tied at the cut share the",
    "  last places (the expected value of picking among them at random).",
    "  The rules rank events deny > review > allow. Their AP is the step-wise AP of that 3-level",
    "  rank, each level one tied block: three steps (deny; deny+review; everyone).",
    "  Top k per day: a reviewer's daily queue of the k highest-ranked events of each UTC day.",
)


def format_table(result: EvaluationResult) -> str:
    """The evaluation as a plain-text table for a terminal."""
    lines = _counts_block(result)
    lines += _side_rows(result.ours, result.rules, result.top_k)
    lines += _segment_rows(result)
    lines += _calibration_rows(result)
    lines += ["", *NOTES]
    return "\n".join(lines) + "\n"
