"""The shadow report: its numbers (checked against `scoring.evaluate` and brute force), the HTML
page (self-contained, cautions present, no identifiers), the plots, and the terminal summary."""

from __future__ import annotations

import base64
import re
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from sklearn import metrics

from scoring import evaluate as ev
from service import files
from service.tables import LabelTable, ScoreTable
from service.workers.evaluation_inputs import EvaluationError
from service.workers.shadow import (
    CURVE_POINTS,
    build_shadow_report,
    capacities_to_show,
    render_html,
    shadow_files,
    terminal_summary,
    write_report,
)

DAY_S = 86_400.0
START_S = 1_717_200_000.0  # 2024-06-01 00:00 UTC


def make_tables(n: int, seed: int = 0, days: int = 14) -> tuple[ScoreTable, LabelTable]:
    """Invented scores, a rules column, amounts, and labels for part of the events."""
    rng = np.random.default_rng(seed)
    fraud = rng.random(n) < 0.03
    risk = np.where(fraud, rng.beta(4, 3, n), rng.beta(1.1, 12, n))
    decision = np.where(risk >= 0.8, "deny", np.where(risk >= 0.5, "review", "allow"))
    rules_alert = rng.random(n) < np.where(fraud, 0.4, 0.03)
    rules = np.where(rules_alert, np.where(rng.random(n) < 0.3, "deny", "review"), "allow")
    ids = [f"sh{i:07d}" for i in range(n)]
    ts = START_S + np.sort(rng.random(n)) * days * DAY_S
    amount = np.where(rng.random(n) < 0.95, np.round(rng.gamma(2, 40, n), 2), np.nan)
    scores = ScoreTable(ids, ts, risk, decision.tolist(), [""] * n, rules.tolist(), amount)
    keep = np.flatnonzero(np.where(fraud, rng.random(n) < 0.7, rng.random(n) < 0.2))
    labels = LabelTable([ids[i] for i in keep], ts[keep] + 2 * DAY_S, fraud[keep])
    return scores, labels


@pytest.fixture(scope="module")
def tables() -> tuple[ScoreTable, LabelTable]:
    return make_tables(6000)


@pytest.fixture(scope="module")
def page(tables: tuple[ScoreTable, LabelTable]) -> str:
    scores, labels = tables
    return render_html(build_shadow_report(scores, labels, review_capacity_per_day=40))


# --- numbers -----------------------------------------------------------------------------------


def test_report_numbers_match_the_pure_comparison(tables: tuple[ScoreTable, LabelTable]) -> None:
    """Reference: scoring.evaluate.compare_decisions on the same joined columns, and brute force
    for label counts and volumes."""
    scores, labels = tables
    report = build_shadow_report(scores, labels)
    fraud = np.isin(scores.event_id, np.array(labels.event_id)[labels.is_fraud])
    expected = ev.compare_decisions(
        ev.decision_codes(scores.decision),
        ev.decision_codes(scores.current_decision or []),
        fraud,
        risk=scores.risk,
        amount=scores.amount,
    )
    assert report.comparison is not None
    np.testing.assert_array_equal(report.comparison.agreement, expected.agreement)
    assert report.comparison.by_decision == expected.by_decision
    assert report.comparison.same_volume == expected.same_volume
    assert report.labels is not None
    assert report.labels.fraud == fraud.sum()
    assert report.labels.fraud + report.labels.not_fraud + report.labels.unlabelled == len(scores)
    assert report.ours.alerts == np.isin(scores.decision, ["review", "deny"]).sum()
    assert report.days == 14
    assert (report.first_day, report.last_day) == ("2024-06-01", "2024-06-14")


def test_plot_series_are_downsampled_and_keep_the_ap_steps() -> None:
    """Reference: sklearn average_precision_score. Without downsampling (few fraud), the
    plotted steps ("steps-pre": precision p_i over (r_(i-1), r_i]) enclose exactly the AP."""
    scores, labels = make_tables(3000, seed=1)
    plots = build_shadow_report(scores, labels).plots
    assert plots.pr_ours is not None
    recall, precision = plots.pr_ours
    fraud = np.isin(scores.event_id, np.array(labels.event_id)[labels.is_fraud])
    area = float(np.sum(np.diff(recall) * precision[1:]))
    assert area == pytest.approx(metrics.average_precision_score(fraud, scores.risk))
    big_scores, big_labels = make_tables(200_000, seed=2)
    big = build_shadow_report(big_scores, big_labels).plots
    assert big.pr_ours is not None
    assert big.pr_ours[0].size <= CURVE_POINTS + 2
    assert big.thresholds.size <= 201
    assert sum(int(h.sum()) for h in big.histograms.values()) == len(big_scores)


def test_capacity_rows_bracket_the_given_capacity(tables: tuple[ScoreTable, LabelTable]) -> None:
    """Reference: scoring.evaluate.threshold_for_capacity (p90) for each row."""
    scores, labels = tables
    report = build_shadow_report(scores, labels, review_capacity_per_day=40)
    assert [row.per_day for row in report.capacity] == [20.0, 40.0, 80.0]
    day = ev.utc_day(scores.ts_s)
    for row in report.capacity:
        assert row.threshold == ev.threshold_for_capacity(scores.risk, day, row.per_day).threshold
        assert row.p90_per_day <= row.per_day


def test_default_capacities_follow_the_daily_volume() -> None:
    assert capacities_to_show(None, 10_000) == [10.0, 25.0, 50.0, 100.0, 200.0, 500.0]
    assert capacities_to_show(None, 300) == [1.0, 1.5, 3.0, 6.0, 15.0]
    assert capacities_to_show(30, 10_000) == [15.0, 30.0, 60.0]


@pytest.mark.parametrize("capacity", [0, -5, float("nan")])
def test_bad_capacity_is_refused(tables: tuple[ScoreTable, LabelTable], capacity: float) -> None:
    with pytest.raises(EvaluationError, match="positive number"):
        build_shadow_report(tables[0], tables[1], review_capacity_per_day=capacity)


def test_without_labels_and_without_rules(tables: tuple[ScoreTable, LabelTable]) -> None:
    scores, _ = tables
    report = build_shadow_report(replace(scores, current_decision=None), None)
    assert (report.labels, report.rules, report.comparison) == (None, None, None)
    assert report.plots.pr_ours is None
    assert list(report.plots.histograms) == ["all events"]
    html = render_html(report)
    assert html.count("data:image/svg+xml;base64,") == 3  # no precision-recall plot
    assert "no labels were given" in html
    assert "no current_decision" in html
    summary = terminal_summary(report)
    assert "no labels given" in summary


# --- the page ----------------------------------------------------------------------------------


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))


def test_page_is_self_contained(page: str) -> None:
    """Nothing is fetched: no script, no stylesheet link, every image a data: URI."""
    parser = _Collector()
    parser.feed(page)
    names = [tag for tag, _ in parser.tags]
    assert "script" not in names
    assert "link" not in names
    images = [attrs.get("src") or "" for tag, attrs in parser.tags if tag == "img"]
    assert len(images) == 4
    assert all(src.startswith("data:image/svg+xml;base64,") for src in images)
    assert not re.search(r"(src|href)=['\"]?(https?:)?//", page)


def test_page_carries_the_cautions_before_any_figure(page: str) -> None:
    first_table = page.index("<table")
    for words in (
        "human review path for automated denials",
        "disparate impact",
        "local law on automated decisions and data protection",
    ):
        assert 0 < page.index(words) < first_table


def test_page_holds_no_identifiers_or_event_ids(page: str) -> None:
    """Privacy: the report shows counts and rates only."""
    decoded = [base64.b64decode(m).decode() for m in re.findall(r"base64,([A-Za-z0-9+/=]+)", page)]
    for text in (page, *decoded):
        assert "sh000" not in text


def test_plots_are_labelled(page: str) -> None:
    """Each plot has a title and axis labels (matplotlib keeps text as comments in its SVG)."""
    svgs = [base64.b64decode(m).decode() for m in re.findall(r"base64,([A-Za-z0-9+/=]+)", page)]
    expected = [
        ("Risk by outcome", "emberscore risk", "fraud ("),
        ("Precision against recall", "recall (share of labelled fraud alerted)", "AP "),
        ("Alert rate against threshold", "risk threshold", "rules' alert rate"),
        ("Daily alert volume", "alerts per day", "review capacity (40 per day)"),
    ]
    for svg, words in zip(svgs, expected, strict=True):
        assert svg.lstrip().startswith("<?xml")
        for word in words:
            assert word in svg, word


def test_title_is_escaped(tables: tuple[ScoreTable, LabelTable]) -> None:
    report = build_shadow_report(tables[0], tables[1], title="Q3 <review> & rules")
    assert "<title>Q3 &lt;review&gt; &amp; rules</title>" in render_html(report)


def test_same_report_renders_the_same_page(tables: tuple[ScoreTable, LabelTable]) -> None:
    """Regression: SVG ids are salted with a fixed value, so pages compare equal run to run."""
    report = build_shadow_report(tables[0], tables[1])
    assert render_html(report) == render_html(report)


def test_write_report(tmp_path: Path, tables: tuple[ScoreTable, LabelTable]) -> None:
    report = build_shadow_report(tables[0], tables[1])
    written = write_report(tmp_path / "report.html", report)
    assert written.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    with pytest.raises(EvaluationError, match="does not exist"):
        write_report(tmp_path / "absent" / "report.html", report)


def test_terminal_summary(tables: tuple[ScoreTable, LabelTable]) -> None:
    report = build_shadow_report(tables[0], tables[1], review_capacity_per_day=40)
    summary = terminal_summary(report)
    assert summary.startswith("emberscore shadow report: 6,000 events, 2024-06-01 to 2024-06-14")
    assert "same decision on" in summary
    assert "at the rules' alert volume" in summary
    assert "fraud amount" in summary
    assert "review capacity 40/day" in summary


def test_shadow_files_reads_writes_and_summarises(tmp_path: Path) -> None:
    scores, labels = make_tables(2000, seed=3)
    files.write_scores(tmp_path / "scores.csv", scores)
    files.write_labels(tmp_path / "labels.csv", labels)
    report = shadow_files(tmp_path / "scores.csv", tmp_path / "labels.csv",
                          html_path=tmp_path / "r.html", review_capacity_per_day=10)  # fmt: skip
    assert report.events == 2000
    assert (tmp_path / "r.html").stat().st_size > 10_000


def test_small_awkward_inputs_still_render() -> None:
    """Regression: one day, every risk tied, labels without any fraud, a missing rules
    decision: the report renders with n/a where a figure is undefined, never a traceback."""
    n = 5
    scores = ScoreTable(
        [f"x{i}" for i in range(n)],
        np.full(n, START_S),
        np.full(n, 0.3),
        ["allow"] * n,
        [""] * n,
        ["allow", "deny", None, "review", "allow"],
        np.full(n, np.nan),
    )
    labels = LabelTable(["x0", "x1", "ghost"], np.full(3, START_S), np.zeros(3, dtype=bool))
    report = build_shadow_report(scores, labels, review_capacity_per_day=1)
    assert report.days == 1
    assert report.comparison is not None
    assert report.comparison.excluded == 1
    assert report.labels is not None
    assert report.labels.unknown_ids == 1
    assert report.plots.pr_ours is None
    html = render_html(report)
    assert "n/a" in html
    assert "none fits" in html  # five tied events exceed one review a day
    assert "review capacity 1/day: nothing fits" in terminal_summary(report)
