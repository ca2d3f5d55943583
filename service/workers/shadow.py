"""The `shadow` command's work: emberscore's decisions beside the rules in force, as numbers
(`build_shadow_report`), a self-contained HTML page (`render_html`, `write_report`) and a short
terminal summary. Any source of a ScoreTable can feed it (a backfill file, a live shadow log).

Outcomes: labelled fraud, labelled not fraud, or unlabelled. Catch figures count an unlabelled
event as not fraud (common practice, no source); the score distribution plot keeps them apart.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import numpy.typing as npt

from scoring import evaluate as ev
from scoring.evaluate_daily import SECONDS_PER_DAY, VolumeStatistic
from service import files
from service.tables import LabelTable, ScoreTable
from service.workers.evaluation_inputs import (
    EvaluationError,
    checked_risk,
    join_labels,
    rules_rank,
    score_index,
)

CAPACITY_STATISTIC: VolumeStatistic = "p90"
DEFAULT_CAPACITY_SHARES = (0.001, 0.0025, 0.005, 0.01, 0.02, 0.05)
HISTOGRAM_BINS = 40
CURVE_POINTS = 600
THRESHOLD_POINTS = 201


@dataclass(frozen=True)
class LabelCounts:
    """Outcomes of the scored events, and labels that name no scored event."""

    fraud: int
    not_fraud: int
    unlabelled: int
    unknown_ids: int


@dataclass(frozen=True)
class Volumes:
    """One side's decisions: counts, alert share (review or deny), and alerts per UTC day."""

    review: int
    deny: int
    alerts: int
    alert_rate: float
    mean_per_day: float
    p90_per_day: float
    max_per_day: int


@dataclass(frozen=True)
class PlotData:
    """Downsampled series for the plots (a few hundred points whatever the number of events)."""

    bin_edges: npt.NDArray[np.float64]
    histograms: dict[str, npt.NDArray[np.int64]]  # outcome -> events per risk bin
    pr_ours: tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]] | None  # recall, precision
    pr_rules: tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]] | None
    ap_ours: float
    ap_rules: float
    point_ours: tuple[float, float] | None  # recall, precision of emberscore's own decisions
    point_rules: tuple[float, float] | None
    thresholds: npt.NDArray[np.float64]
    alert_rates: npt.NDArray[np.float64]  # share of events with risk >= each threshold
    days: npt.NDArray[np.int64]
    daily_events: npt.NDArray[np.int64]
    daily_ours: npt.NDArray[np.int64]
    daily_rules: npt.NDArray[np.int64] | None


@dataclass(frozen=True)
class ShadowReport:
    """Numbers of one shadow report; `render_html` and `terminal_summary` only format them.

    `labels` is None without a labels file, `rules` and `comparison` None when the scores carry
    no current_decision. `capacity` rows choose the lowest threshold whose p90 daily volume fits.
    """

    title: str
    generated_at: str
    events: int
    first_day: str
    last_day: str
    days: int
    labels: LabelCounts | None
    ours: Volumes
    rules: Volumes | None
    comparison: ev.ShadowComparison | None
    capacity_per_day: float | None
    capacity: list[ev.CapacityThreshold]
    plots: PlotData


def _iso_day(day: int) -> str:
    return datetime.fromtimestamp(day * SECONDS_PER_DAY, UTC).date().isoformat()


def _volumes(codes: npt.NDArray[np.int8], day: npt.NDArray[np.int64]) -> Volumes:
    alerted = codes >= 1
    _, counts = ev.daily_counts(day, alerted)
    return Volumes(
        review=int(np.count_nonzero(codes == 1)),
        deny=int(np.count_nonzero(codes == 2)),
        alerts=int(np.count_nonzero(alerted)),
        alert_rate=float(alerted.mean()),
        mean_per_day=float(counts.mean()),
        p90_per_day=float(np.quantile(counts, 0.9)),
        max_per_day=int(counts.max()),
    )


def _nice(value: float) -> float:
    """Two significant digits, at least 1: capacities a person would pick."""
    if value <= 1:
        return 1.0
    return float(round(value, 1 - math.floor(math.log10(value))))


def capacities_to_show(per_day: float | None, events_per_day: float) -> list[float]:
    """The given capacity with half and twice it; without one, shares of the daily events."""
    if per_day is not None:
        return [per_day / 2, float(per_day), 2.0 * per_day]
    return sorted({_nice(events_per_day * share) for share in DEFAULT_CAPACITY_SHARES})


def _pr(
    risk: npt.NDArray[np.float64], fraud: npt.NDArray[np.bool_]
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """(recall, precision) as recall grows, sampled on a recall grid, from recall 0.

    Each point is where a recall level is first reached, so a step plot ("steps-pre") draws the
    same steps as average precision sums; a tail of a million thresholds becomes CURVE_POINTS.
    """
    precision, recall, _ = ev.precision_recall_curve(risk, fraud)
    recall, precision = recall[-2::-1], precision[-2::-1]  # highest threshold first
    grid = np.linspace(0.0, 1.0, CURVE_POINTS)
    keep = np.unique(np.r_[np.searchsorted(recall, grid, side="left"), recall.size - 1])
    keep = keep[keep < recall.size]
    return np.r_[0.0, recall[keep]], np.r_[precision[keep[0]], precision[keep]]


def _point(alerted: npt.NDArray[np.bool_], fraud: npt.NDArray[np.bool_]) -> tuple[float, float]:
    result = ev.at_threshold(alerted.astype(np.float64), fraud, 1.0)
    return result.recall, result.precision


def _histograms(
    risk: npt.NDArray[np.float64], outcome: npt.NDArray[np.int8], with_labels: bool
) -> tuple[npt.NDArray[np.float64], dict[str, npt.NDArray[np.int64]]]:
    edges = np.linspace(min(0.0, risk.min()), max(1.0, risk.max()), HISTOGRAM_BINS + 1)
    groups = {"fraud": 1, "not fraud": 0, "unlabelled": -1} if with_labels else {"all events": -1}
    counts = {
        name: np.histogram(risk[outcome == code], bins=edges)[0].astype(np.int64)
        for name, code in groups.items()
    }
    return edges, counts


def _threshold_curve(
    risk: npt.NDArray[np.float64],
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    thresholds = np.linspace(min(0.0, risk.min()), max(1.0, risk.max()), THRESHOLD_POINTS)
    ranked = np.sort(risk)
    above = ranked.size - np.searchsorted(ranked, thresholds, side="left")
    return thresholds, above / ranked.size


@dataclass(frozen=True)
class _Columns:
    """The score columns lined up for the report."""

    risk: npt.NDArray[np.float64]
    day: npt.NDArray[np.int64]
    ours: npt.NDArray[np.int8]
    rules: npt.NDArray[np.int8] | None  # decision codes, -1 where missing
    fraud: npt.NDArray[np.bool_]
    outcome: npt.NDArray[np.int8]  # 1 fraud, 0 not fraud, -1 unlabelled


def _plot_data(c: _Columns, with_labels: bool) -> PlotData:
    edges, histograms = _histograms(c.risk, c.outcome, with_labels)
    thresholds, rates = _threshold_curve(c.risk)
    days, daily_events = ev.daily_counts(c.day, np.ones(c.risk.size, dtype=np.bool_))
    has_fraud = with_labels and bool(c.fraud.any())
    rank = None if c.rules is None else np.maximum(c.rules, 0).astype(np.float64)
    rules_on = has_fraud and rank is not None
    return PlotData(
        bin_edges=edges,
        histograms=histograms,
        pr_ours=_pr(c.risk, c.fraud) if has_fraud else None,
        pr_rules=_pr(rank, c.fraud) if rules_on and rank is not None else None,
        ap_ours=ev.average_precision(c.risk, c.fraud) if has_fraud else math.nan,
        ap_rules=ev.average_precision(rank, c.fraud) if rules_on and rank is not None else math.nan,
        point_ours=_point(c.ours >= 1, c.fraud) if has_fraud else None,
        point_rules=_point(c.rules >= 1, c.fraud) if rules_on and c.rules is not None else None,
        thresholds=thresholds,
        alert_rates=rates,
        days=days,
        daily_events=daily_events,
        daily_ours=ev.daily_counts(c.day, c.ours >= 1)[1],
        daily_rules=None if c.rules is None else ev.daily_counts(c.day, c.rules >= 1)[1],
    )


def _columns(scores: ScoreTable, labels: LabelTable | None) -> tuple[_Columns, LabelCounts | None]:
    risk = checked_risk(scores)
    joined = join_labels(scores, labels, index=score_index(scores))
    outcome = np.where(joined.labelled, joined.is_fraud.astype(np.int8), -1).astype(np.int8)
    rules = None
    if rules_rank(scores) is not None and scores.current_decision is not None:
        rules = ev.decision_codes(scores.current_decision)
    columns = _Columns(
        risk,
        ev.utc_day(scores.ts_s),
        ev.decision_codes(scores.decision),
        rules,
        joined.is_fraud,
        outcome,
    )
    if labels is None:
        return columns, None
    counts = LabelCounts(
        fraud=int(np.count_nonzero(outcome == 1)),
        not_fraud=int(np.count_nonzero(outcome == 0)),
        unlabelled=int(np.count_nonzero(outcome == -1)),
        unknown_ids=joined.unknown_ids,
    )
    return columns, counts


def build_shadow_report(
    scores: ScoreTable,
    labels: LabelTable | None,
    *,
    review_capacity_per_day: float | None = None,
    title: str = "emberscore shadow report",
) -> ShadowReport:
    """Compute every number of the shadow report from scores (and labels, when there are any)."""
    if review_capacity_per_day is not None and not review_capacity_per_day > 0:
        raise EvaluationError(
            f"review capacity per day must be a positive number, got {review_capacity_per_day}"
        )
    c, label_counts = _columns(scores, labels)
    days, _ = ev.daily_counts(c.day, np.ones(c.risk.size, dtype=np.bool_))
    comparison = None
    if c.rules is not None:
        comparison = ev.compare_decisions(
            c.ours, c.rules, c.fraud, risk=c.risk, amount=scores.amount
        )
    capacities = capacities_to_show(review_capacity_per_day, c.risk.size / days.size)
    fraud = c.fraud if label_counts is not None else None
    return ShadowReport(
        title=title,
        generated_at=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        events=int(c.risk.size),
        first_day=_iso_day(int(days[0])),
        last_day=_iso_day(int(days[-1])),
        days=int(days.size),
        labels=label_counts,
        ours=_volumes(c.ours, c.day),
        rules=None if c.rules is None else _volumes(c.rules, c.day),
        comparison=comparison,
        capacity_per_day=review_capacity_per_day,
        capacity=ev.capacity_table(
            c.risk, c.day, capacities, is_fraud=fraud, statistic=CAPACITY_STATISTIC
        ),
        plots=_plot_data(c, label_counts is not None),
    )


def money(value: float) -> str:
    """An amount with thousands separators and two decimals (the unit is the events' own)."""
    return f"{value:,.2f}"


def share(part: float, whole: float) -> str:
    """`part` as a percentage of `whole`, or n/a."""
    if not whole or math.isnan(part):
        return "n/a"
    percent = 100 * part / whole
    return "<0.1%" if 0 < percent < 0.05 else f"{percent:.1f}%"


def _summary_catches(report: ShadowReport) -> list[str]:
    c, labels = report.comparison, report.labels
    if labels is None:
        return ["no labels given: catches and precision cannot be measured"]
    lines = [
        f"labelled fraud {labels.fraud:,}; not fraud {labels.not_fraud:,}; "
        f"unlabelled {labels.unlabelled:,} (counted as not fraud)"
    ]
    if c is None or labels.fraud == 0:
        return lines
    d, s = c.by_decision, c.same_volume
    lines.append(
        f"fraud caught: emberscore {d.ours:,} ({share(d.ours, d.fraud)}), rules "
        f"{d.rules:,} ({share(d.rules, d.fraud)}), both {d.both:,}, neither {d.neither:,}"
    )
    lines.append(
        f"at the rules' alert volume ({c.same_volume_alerts:,} alerts) emberscore catches "
        f"{s.ours:,}: {s.only_ours:,} the rules miss, while missing {s.only_rules:,} "
        "they catch"
    )
    if d.amount is not None:
        lines.append(
            f"fraud amount {money(d.amount.fraud)}: emberscore catches "
            f"{money(d.amount.ours)}, rules {money(d.amount.rules)}, neither "
            f"{money(d.amount.neither)}"
        )
    return lines


def terminal_summary(report: ShadowReport) -> str:
    """A few lines for the terminal: volumes, agreement, catches, amount, capacity threshold."""
    lines = [
        f"{report.title}: {report.events:,} events, {report.first_day} to "
        f"{report.last_day} ({report.days} days)"
    ]
    alerts = f"alerts (review or deny): emberscore {report.ours.alerts:,} " + (
        f"({100 * report.ours.alert_rate:.2f}%)"
    )
    if report.rules is not None and report.comparison is not None:
        alerts += (
            f", rules {report.rules.alerts:,} ({100 * report.rules.alert_rate:.2f}%); "
            f"same decision on {100 * report.comparison.agreement_rate:.1f}% of events"
        )
    lines += [alerts, *_summary_catches(report)]
    for row in report.capacity:
        if report.capacity_per_day is not None and row.per_day != report.capacity_per_day:
            continue
        where = "nothing fits" if math.isinf(row.threshold) else f"risk >= {row.threshold:.4f}"
        lines.append(
            f"review capacity {row.per_day:,.0f}/day: {where} (p90 {row.p90_per_day:,.0f}/day)"
        )
    return "\n".join(lines) + "\n"


def render_html(report: ShadowReport) -> str:
    """The report as one self-contained HTML page (inline CSS, plots as embedded SVG)."""
    from service.workers.shadow_html import render_page  # loads matplotlib only to draw

    return render_page(report)


def write_report(path: Path | str, report: ShadowReport) -> Path:
    """Write the HTML report to `path` (UTF-8) and return the path written."""
    target = Path(path)
    if target.parent and not target.parent.is_dir():
        raise EvaluationError(f"cannot write the report: the folder {target.parent} does not exist")
    target.write_text(render_html(report), encoding="utf-8")
    return target


def shadow_files(
    scores_path: Path | str,
    labels_path: Path | str | None,
    *,
    html_path: Path | str,
    review_capacity_per_day: float | None = None,
    title: str = "emberscore shadow report",
    labels_reject_path: Path | str | None = None,
) -> ShadowReport:
    """Read the files, build the report, write the HTML page; the report for a summary."""
    scores = files.read_scores(scores_path)
    labels = None
    if labels_path is not None:
        labels = files.read_labels(labels_path, reject_path=labels_reject_path).table
    report = build_shadow_report(
        scores, labels, review_capacity_per_day=review_capacity_per_day, title=title
    )
    write_report(html_path, report)
    return report
