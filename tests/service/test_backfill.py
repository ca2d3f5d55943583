"""``emberscore backfill`` end to end through `service.cli.main`, against the per-event engine.

The reference is the per-event replay (`service.replay.replay` through `Engine`, `MemoryStore`
and an in-process `Learner`) of the same generated stream: DESIGN.md tenet 2 says a backfilled
score equals the score the live service would have returned. Scores files are read back with
`service.files.read_scores` and, for the formats' own rules, with Python's ``csv`` module
(RFC 4180 quoting) and ``pyarrow.parquet`` (the Apache Parquet reference implementation).
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from test_backfill_support import (
    assert_matches,
    assert_private,
    clean_environment,
    identifier_values,
    per_event_replay,
    reference,
    scenario,
    settings,
    write_stream,
)

from service.cli import main
from service.files import read_scores, sort_events, write_events, write_labels
from service.tables import LabelTable
from service.workers.backfill_progress import Progress


@pytest.fixture(scope="module")
def stream(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return Path(write_stream(tmp_path_factory.mktemp("stream")))


@pytest.fixture(autouse=True)
def environment(monkeypatch: pytest.MonkeyPatch) -> None:
    clean_environment(monkeypatch)


def backfill(*args: str | Path) -> int:
    return main(["backfill", *(str(a) for a in args), "--no-progress"])


@pytest.mark.parametrize(
    ("fmt_in", "fmt_out"),
    [("csv", "csv"), ("parquet", "parquet"), ("jsonl", "jsonl"), ("csv", "parquet"),
     ("parquet", "csv.gz")],
)  # fmt: skip
def test_scores_equal_the_per_event_replay(
    stream: Path, tmp_path: Path, fmt_in: str, fmt_out: str
) -> None:
    out = tmp_path / f"scores.{fmt_out}"
    code = backfill(stream / f"events.{fmt_in}", "--labels", stream / f"labels.{fmt_in}",
                    "--out", out)  # fmt: skip
    assert code == 0
    assert_matches(out, reference().scores)


def test_csv_output_follows_rfc4180_and_parquet_has_typed_columns(
    stream: Path, tmp_path: Path
) -> None:
    for fmt in ("csv", "parquet"):
        assert backfill(stream / "events.csv", "--labels", stream / "labels.csv",
                        "--out", tmp_path / f"s.{fmt}") == 0  # fmt: skip
    rows = list(csv.DictReader(io.StringIO((tmp_path / "s.csv").read_text(encoding="utf-8"))))
    assert list(rows[0]) == ["event_id", "ts", "risk", "decision", "reasons",
                             "current_decision", "amount"]  # fmt: skip
    assert len(rows) == len(scenario().events)
    table = pq.read_table(tmp_path / "s.parquet")
    assert str(table.schema.field("ts").type) == "timestamp[ms, tz=UTC]"
    assert str(table.schema.field("risk").type) == "double"
    assert table.column("event_id").to_pylist() == [r["event_id"] for r in rows]


def test_summary_counts_and_speed(
    stream: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The summary gives the counts of the run and the speed; no identifier value, no progress
    line when asked for none."""
    sc = scenario()
    assert backfill(stream / "events.csv", "--labels", stream / "labels.csv",
                    "--out", tmp_path / "s.csv") == 0  # fmt: skip
    out, err = capsys.readouterr()
    n = len(sc.events)
    assert f"{n:,} read, 0 rejected, {n:,} scored" in out
    assert f"{len(sc.labels):,} read, 0 rejected" in out
    assert "events/s end to end" in out
    for stage in ("reading", "planning", "features", "learning", "scoring", "writing"):
        assert f"{stage} " in out
    assert err == ""
    assert_private(out, identifier_values(sc.events))


def test_unsorted_input_is_replayed_in_time_order(stream: Path, tmp_path: Path) -> None:
    """Rows shuffled in the file: the output is in time order and equals the sorted replay."""
    sc = scenario()
    assert len(np.unique(sc.events.ts_s)) == len(sc.events)  # no ties: one correct order
    shuffled = sc.events.take(np.random.default_rng(5).permutation(len(sc.events)))
    write_events(tmp_path / "events.csv", shuffled)
    out = tmp_path / "scores.csv"
    assert backfill(tmp_path / "events.csv", "--labels", stream / "labels.csv", "--out", out) == 0
    assert_matches(out, reference().scores)


def test_equal_times_keep_their_file_order(tmp_path: Path) -> None:
    """Ties in ``ts`` are broken by the order of the file (a stable sort), as the reference is."""
    sc = scenario()
    events = sc.events.take(np.arange(2000))
    events.ts_s = np.floor(events.ts_s / 3600.0) * 3600.0  # many events share each hour
    shuffled = events.take(np.random.default_rng(9).permutation(len(events)))
    write_events(tmp_path / "events.parquet", shuffled)
    out = tmp_path / "scores.csv"
    assert backfill(tmp_path / "events.parquet", "--out", out) == 0
    expected = per_event_replay(sort_events(shuffled), None, settings())
    assert_matches(out, expected.scores)


def test_labels_of_unknown_events_are_counted(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], stream: Path
) -> None:
    sc = scenario()
    extra = LabelTable(
        [*sc.labels.event_id, "evt_not_in_the_file_1", "evt_not_in_the_file_2"],
        np.append(sc.labels.labeled_at_s, [sc.events.ts_s[100], sc.events.ts_s[200]]),
        np.append(sc.labels.is_fraud, [True, False]),
    )
    write_labels(tmp_path / "labels.csv", extra)
    assert backfill(stream / "events.csv", "--labels", tmp_path / "labels.csv",
                    "--out", tmp_path / "s.csv") == 0  # fmt: skip
    out = capsys.readouterr().out
    assert "2 unknown (2 name no event of the events file" in out
    assert_matches(tmp_path / "s.csv", reference().scores)  # unknown labels change nothing


def test_without_labels_and_without_optional_columns(tmp_path: Path) -> None:
    """No labels file; no current_decision or amount in the input: none in the output."""
    sc = scenario()
    events = sc.events.take(np.arange(3000))
    events.current_decision = [None] * len(events)
    events.amount = np.full(len(events), np.nan)
    write_events(tmp_path / "events.jsonl", events)
    out = tmp_path / "scores.csv"
    assert backfill(tmp_path / "events.jsonl", "--out", out) == 0
    got = read_scores(out)
    assert got.current_decision is None
    assert got.amount is None
    assert_matches(out, per_event_replay(events, None, settings()).scores)


# --- progress line -----------------------------------------------------------------------------


class FakeClock:
    """Seconds set by the test: the progress line's arithmetic, not the wall clock, is tested."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_progress_line_shows_stage_rows_speed_and_time_left() -> None:
    stream, clock = io.StringIO(), FakeClock()
    progress = Progress(stream, total_rows=1_000_000, clock=clock)
    progress.stage("planning")
    clock.now += 12.0
    progress.stage("scoring")
    progress.rows(0)
    clock.now += 10.0
    progress.rows(250_000)
    line = progress.line()
    assert line.startswith("[5/6 scoring] ######")
    assert "250,000/1,000,000 (25%)" in line
    assert "25,000 events/s" in line
    assert "30 s left" in line
    seconds = progress.finish()
    assert seconds == {"planning": 12.0, "scoring": 10.0}
    assert stream.getvalue().endswith("\r")  # the line is cleared at the end


def test_rows_reused_from_a_checkpoint_do_not_count_as_speed() -> None:
    clock = FakeClock()
    progress = Progress(None, total_rows=300, clock=clock)
    progress.stage("scoring")
    progress.rows(200, reused=True)
    clock.now += 2.0
    progress.rows(300)
    assert progress.rate() == 50.0
