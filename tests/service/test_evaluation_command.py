"""The `evaluate` command's work: joining labels, the figures of both sides, segments, the table,
and reading real files with `service.files`. Figures are checked against scikit-learn (the
reference implementation) on the joined arrays and against brute force."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from sklearn import metrics

from scoring import evaluate as ev
from service import files
from service.files_base import InputError
from service.tables import LabelTable, ScoreTable
from service.workers.evaluation import (
    EvaluationError,
    evaluate_files,
    evaluate_tables,
    format_table,
    parse_as_of,
    read_segments,
)
from service.workers.evaluation_inputs import join_labels

DAY_S = 86_400.0
START_S = 1_717_200_000.0  # 2024-06-01 00:00 UTC


def make_tables(n: int, seed: int = 0, days: int = 10) -> tuple[ScoreTable, LabelTable]:
    """Invented scores with a rules column and labels for part of the events."""
    rng = np.random.default_rng(seed)
    fraud = rng.random(n) < 0.04
    risk = np.round(np.where(fraud, rng.beta(4, 3, n), rng.beta(1.2, 10, n)), 3)
    decision = np.where(risk >= 0.8, "deny", np.where(risk >= 0.5, "review", "allow"))
    rules_alert = rng.random(n) < np.where(fraud, 0.4, 0.03)
    rules = np.where(rules_alert, np.where(rng.random(n) < 0.3, "deny", "review"), "allow")
    ids = [f"e{i:06d}" for i in range(n)]
    ts = START_S + np.sort(rng.random(n)) * days * DAY_S
    scores = ScoreTable(ids, ts, risk, decision.tolist(), [""] * n, rules.tolist(),
                        np.round(rng.gamma(2, 40, n), 2))  # fmt: skip
    keep = np.flatnonzero(np.where(fraud, rng.random(n) < 0.8, rng.random(n) < 0.3))
    labels = LabelTable([ids[i] for i in keep], ts[keep] + 3 * DAY_S, fraud[keep])
    return scores, labels


def _labels(rows: list[tuple[str, float, bool]]) -> LabelTable:
    return LabelTable([r[0] for r in rows], np.array([r[1] for r in rows]),
                      np.array([r[2] for r in rows]))  # fmt: skip


def _scores(ids: list[str], risk: list[float], rules: list[str | None] | None = None) -> ScoreTable:
    n = len(ids)
    decision = ["deny" if r >= 0.8 else "allow" for r in risk]
    return ScoreTable(ids, START_S + np.arange(n) * 3600.0, np.array(risk), decision, [""] * n,
                      rules)  # fmt: skip


# --- joining labels ----------------------------------------------------------------------------


def test_join_counts_unknown_ids_and_applies_as_of_and_latest_label() -> None:
    scores = _scores(["a", "b", "c"], [0.9, 0.5, 0.1])
    labels = _labels([
        ("a", 100.0, False), ("a", 200.0, True),  # corrected: the later label counts
        ("b", 500.0, True),  # arrives after as_of
        ("zz", 50.0, True),  # names no scored event
        ("yy", 900.0, True),  # unknown and late: counted once, as unknown
    ])  # fmt: skip
    joined = join_labels(scores, labels, as_of_s=300.0)
    assert joined.is_fraud.tolist() == [True, False, False]
    assert joined.labelled.tolist() == [True, False, False]
    assert (joined.unknown_ids, joined.after_as_of, joined.superseded) == (2, 1, 1)


def test_without_as_of_every_label_counts() -> None:
    scores = _scores(["a", "b"], [0.9, 0.5])
    joined = join_labels(scores, _labels([("a", 1e12, True), ("b", 1.0, False)]))
    assert joined.is_fraud.tolist() == [True, False]
    assert joined.labelled.tolist() == [True, True]


def test_repeated_score_ids_are_refused() -> None:
    scores = _scores(["a", "a"], [0.9, 0.5])
    with pytest.raises(EvaluationError, match="1 repeated event_id"):
        evaluate_tables(scores, None)


def test_bad_risk_and_empty_scores_are_refused_with_a_message() -> None:
    with pytest.raises(EvaluationError, match="no events"):
        evaluate_tables(_scores([], []), None)
    with pytest.raises(EvaluationError, match="not finite"):
        evaluate_tables(_scores(["a"], [float("nan")]), None)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("2024-06-01", START_S + DAY_S - 1e-6),
        ("2024-06-01T00:00:00Z", START_S),
        ("2024-06-01T02:00:00+02:00", START_S),
    ],
)
def test_parse_as_of(text: str, expected: float) -> None:
    """Reference: ISO 8601 dates and date-times with a zone (a bare date counts to its end)."""
    assert parse_as_of(text) == pytest.approx(expected, abs=1e-5)


@pytest.mark.parametrize("text", ["yesterday", "2024-06-01T00:00:00", "2024-13-01"])
def test_parse_as_of_refuses_unclear_dates(text: str) -> None:
    with pytest.raises(EvaluationError, match="as-of"):
        parse_as_of(text)


# --- figures -----------------------------------------------------------------------------------


def test_figures_equal_sklearn_on_the_joined_arrays() -> None:
    """Reference: sklearn average_precision_score and roc_auc_score, unlabelled = not fraud;
    the rules scored as the 3-level rank deny 2 > review 1 > allow 0."""
    scores, labels = make_tables(4000, seed=1)
    result = evaluate_tables(scores, labels)
    fraud = join_labels(scores, labels).is_fraud
    rank = ev.decision_codes(scores.current_decision or [])
    assert result.ours.average_precision == pytest.approx(
        metrics.average_precision_score(fraud, scores.risk)
    )
    assert result.ours.roc_auc == pytest.approx(metrics.roc_auc_score(fraud, scores.risk))
    assert result.rules is not None
    assert result.rules.average_precision == pytest.approx(
        metrics.average_precision_score(fraud, rank)
    )
    assert result.rules.roc_auc == pytest.approx(metrics.roc_auc_score(fraud, rank))
    assert result.fraud == fraud.sum()
    assert result.labelled == len(labels)


def test_rules_at_an_alert_rate_share_the_tied_level() -> None:
    """Reference: brute force expected value. At 2% the rules alert their denials, then an even
    share of their reviews (a random pick among tied events)."""
    scores, labels = make_tables(5000, seed=2)
    result = evaluate_tables(scores, labels, alert_rates=(0.02,))
    fraud = join_labels(scores, labels).is_fraud
    rank = ev.decision_codes(scores.current_decision or [])
    k = 100
    deny, review = rank == 2, rank == 1
    assert deny.sum() < k < deny.sum() + review.sum()
    expected = fraud[deny].sum() + (k - deny.sum()) * fraud[review].mean()
    assert result.rules is not None
    at = result.rules.at_rates[0]
    assert at.alerts == k
    assert at.true_positives == pytest.approx(expected)


def test_own_decisions_are_review_or_deny() -> None:
    """Reference: brute force over the decision columns."""
    scores, labels = make_tables(3000, seed=3)
    result = evaluate_tables(scores, labels)
    fraud = join_labels(scores, labels).is_fraud
    ours = np.isin(scores.decision, ["review", "deny"])
    assert result.ours.deployed.alerts == ours.sum()
    assert result.ours.deployed.recall == pytest.approx(fraud[ours].sum() / fraud.sum())
    assert result.ours.deployed.precision == pytest.approx(fraud[ours].mean())


def test_without_current_decision_only_emberscore_is_shown() -> None:
    scores, labels = make_tables(500, seed=4)
    result = evaluate_tables(replace(scores, current_decision=None), labels)
    assert result.rules is None
    assert "rules" not in format_table(result).split("notes:")[0]


def test_missing_rules_decisions_are_counted() -> None:
    scores = _scores(["a", "b", "c"], [0.9, 0.5, 0.1], ["deny", None, "allow"])
    result = evaluate_tables(scores, _labels([("a", 1.0, True)]))
    assert result.rules_missing == 1
    assert "events without current_decision" in format_table(result)


def test_no_labels_gives_nan_figures_printed_as_na() -> None:
    scores, _ = make_tables(300, seed=5)
    result = evaluate_tables(scores, None)
    assert math.isnan(result.ours.average_precision)
    table = format_table(result)
    assert "n/a" in table
    assert "Traceback" not in table


# --- segments ----------------------------------------------------------------------------------


def test_segment_catch_rates_at_one_percent(tmp_path: Path) -> None:
    """Reference: brute force. emberscore has no ties at the cut, so its top 1% is a plain sort."""
    scores, labels = make_tables(3000, seed=6)
    scores = replace(scores, risk=scores.risk + np.arange(3000) * 1e-9)  # break ties
    path = tmp_path / "segments.csv"
    names = ["web" if i % 3 else "app" for i in range(3000)]
    rows = [f"{scores.event_id[i]},{names[i]}" for i in range(2990)] + ["ghost,web"]
    path.write_text("event_id,segment\n" + "\n".join(rows) + "\n")
    result = evaluate_tables(scores, labels, segments=read_segments(path))
    assert result.segment_unknown_ids == 1
    fraud = join_labels(scores, labels).is_fraud
    top = np.zeros(3000, bool)
    top[np.argsort(-scores.risk)[:30]] = True
    names[2990:] = ["(no segment)"] * 10
    assert result.segments is not None
    for row in result.segments:
        members = np.array([n == row.segment for n in names]) & fraud
        assert row.fraud == members.sum()
        if members.any():
            assert row.ours == pytest.approx((top & members).sum() / members.sum())
        in_segment = np.array([n == row.segment for n in names])
        assert row.ours_alerted == pytest.approx((top & in_segment).sum() / in_segment.sum())
    assert "share of the segment's events alerted" in format_table(result)


@pytest.mark.parametrize(
    ("content", "match"),
    [
        ("id,segment\na,web\n", "header must name"),
        ("event_id,segment\na,web\na,app\n", "line 3.*earlier line"),
        ("event_id,segment\n,web\n", "line 2.*empty"),
    ],
)
def test_bad_segments_files(tmp_path: Path, content: str, match: str) -> None:
    path = tmp_path / "segments.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=match):
        read_segments(path)


def test_missing_segments_file_is_an_input_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no such file"):
        read_segments(tmp_path / "absent.csv")


# --- files -------------------------------------------------------------------------------------


@pytest.mark.parametrize("suffix", [".csv", ".jsonl", ".parquet"])
def test_evaluate_files_reads_real_files(tmp_path: Path, suffix: str) -> None:
    """The files written by `service.files` give the same figures as the tables in memory."""
    scores, labels = make_tables(800, seed=7)
    files.write_scores(tmp_path / f"scores{suffix}", scores)
    files.write_labels(tmp_path / f"labels{suffix}", labels)
    from_files = evaluate_files(tmp_path / f"scores{suffix}", tmp_path / f"labels{suffix}")
    in_memory = evaluate_tables(scores, labels)
    assert from_files.ours.average_precision == pytest.approx(in_memory.ours.average_precision)
    assert from_files.fraud == in_memory.fraud
    assert format_table(from_files).splitlines()[1:8] == format_table(in_memory).splitlines()[1:8]


def test_evaluate_files_as_of_leaves_later_labels_out(tmp_path: Path) -> None:
    scores, labels = make_tables(600, seed=8, days=10)
    files.write_scores(tmp_path / "scores.csv", scores)
    files.write_labels(tmp_path / "labels.csv", labels)
    result = evaluate_files(tmp_path / "scores.csv", tmp_path / "labels.csv", as_of="2024-06-06")
    known = labels.labeled_at_s <= parse_as_of("2024-06-06")
    assert result.labelled == known.sum()
    assert result.labels.after_as_of == (~known).sum()
    assert "labels known by 2024-06-06 23:59 UTC" in format_table(result)


def test_evaluate_files_missing_file_is_an_input_error(tmp_path: Path) -> None:
    with pytest.raises(InputError):
        evaluate_files(tmp_path / "absent.csv", tmp_path / "labels.csv")
