"""Writing then reading gives equal tables, in every format; chunked score output is byte-equal.

All data is invented: RFC 5737 documentation addresses, example.com mail, 555-01xx numbers.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

import service.files_write as files_write
from service.files import (
    ScoreWriter,
    read_events,
    read_labels,
    read_scores,
    sort_events,
    write_events,
    write_labels,
    write_scores,
)
from service.tables import EventTable, LabelTable, ScoreTable

SUFFIXES = ["csv", "jsonl", "ndjson", "parquet", "csv.gz", "jsonl.gz"]
AWKWARD = [
    'quote " inside',
    "comma, inside",
    "line\nbreak",
    "tab\tand\rreturn",
    "back\\slash",
    "bell\x07",
    "naïve — ünïcödé ✓",
    "007",
    "  padded  ",
    "null",
]


def invented_events(rows: int, seed: int = 1) -> EventTable:
    rng = np.random.default_rng(seed)
    millis = 1_788_000_000_000 + rng.integers(0, 10**9, rows)
    kinds = np.array(["signup", "login", "checkout"], dtype=object)[rng.integers(0, 3, rows)]

    def maybe(values: list[str]) -> list[str | None]:
        return [v if rng.random() > 0.2 else None for v in values]

    return EventTable(
        event_id=[f"ev-{i}" for i in range(rows)],
        ts_s=millis / 1000,
        type=kinds.tolist(),
        account_id=maybe([AWKWARD[i % len(AWKWARD)] for i in range(rows)]),
        ip=maybe([f"192.0.2.{i % 250}" for i in range(rows)]),
        device_id=maybe([f"dev-{i % 17}" for i in range(rows)]),
        phone=maybe([f"+1202555{i % 100:04d}" for i in range(rows)]),
        email=maybe([f"user{i}@example.com" for i in range(rows)]),
        amount=np.where(kinds == "checkout", np.round(rng.random(rows) * 500, 2), np.nan),
        current_decision=maybe(["allow", "review", "deny"] * (rows // 3) + ["allow"] * (rows % 3)),
    )


def invented_scores(rows: int, *, optional: bool = True, seed: int = 2) -> ScoreTable:
    events = invented_events(rows, seed)
    rng = np.random.default_rng(seed)
    risk = rng.random(rows)
    risk[:3] = [0.0, 1.0, 0.5]
    return ScoreTable(
        event_id=events.event_id,
        ts_s=events.ts_s,
        risk=risk,
        decision=np.where(risk > 0.8, "deny", np.where(risk > 0.5, "review", "allow")).tolist(),
        reasons=[
            f"reason {i % 5}; {AWKWARD[i % len(AWKWARD)]}" if i % 4 else "" for i in range(rows)
        ],
        current_decision=events.current_decision if optional else None,
        amount=events.amount if optional else None,
    )


def assert_events_equal(a: EventTable, b: EventTable) -> None:
    for name in ("event_id", "type", "account_id", "ip", "device_id", "phone", "email"):
        assert getattr(a, name) == getattr(b, name), name
    assert a.current_decision == b.current_decision
    assert np.array_equal(a.ts_s, b.ts_s)
    assert np.array_equal(a.amount, b.amount, equal_nan=True)


def chunks(table: ScoreTable, sizes: list[int]) -> list[ScoreTable]:
    out, start = [], 0
    for size in sizes:
        stop = start + size
        out.append(
            ScoreTable(
                table.event_id[start:stop],
                table.ts_s[start:stop],
                table.risk[start:stop],
                table.decision[start:stop],
                table.reasons[start:stop],
                None if table.current_decision is None else table.current_decision[start:stop],
                None if table.amount is None else table.amount[start:stop],
            )
        )
        start = stop
    return out


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_events_round_trip(tmp_path: Path, suffix: str) -> None:
    events = invented_events(300)
    path = tmp_path / f"events.{suffix}"
    write_events(path, events)
    report = read_events(path)
    assert (report.rows_read, report.rows_rejected, report.reject_path) == (300, 0, None)
    assert_events_equal(report.table, events)


def test_event_lines_count_physical_lines_in_csv(tmp_path: Path) -> None:
    """A value with a line break spans two lines: later rows must still name their own line."""
    events = invented_events(30)
    path = tmp_path / "events.csv"
    write_events(path, events)
    text = path.read_text(encoding="utf-8")
    lines = read_events(path).table.line
    physical = text.split("\n")
    for event_id, line in zip(events.event_id, lines.tolist(), strict=True):
        assert physical[line - 1].startswith(f'"{event_id}",')


def test_events_without_current_decision_omit_the_column(tmp_path: Path) -> None:
    events = invented_events(10)
    events.current_decision = [None] * 10
    path = tmp_path / "events.csv"
    write_events(path, events)
    assert "current_decision" not in path.read_text(encoding="utf-8").splitlines()[0]
    assert read_events(path).table.current_decision == [None] * 10


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_labels_round_trip(tmp_path: Path, suffix: str) -> None:
    rng = np.random.default_rng(4)
    labels = LabelTable(
        event_id=[f"ev-{i}" for i in range(50)],
        labeled_at_s=(1_789_000_000_000 + rng.integers(0, 10**9, 50)) / 1000,
        is_fraud=rng.random(50) < 0.3,
    )
    path = tmp_path / f"labels.{suffix}"
    write_labels(path, labels)
    back = read_labels(path).table
    assert back.event_id == labels.event_id
    assert np.array_equal(back.labeled_at_s, labels.labeled_at_s)
    assert np.array_equal(back.is_fraud, labels.is_fraud)


@pytest.mark.parametrize("suffix", SUFFIXES)
@pytest.mark.parametrize("optional", [True, False])
def test_scores_round_trip(tmp_path: Path, suffix: str, optional: bool) -> None:
    scores = invented_scores(200, optional=optional)
    path = tmp_path / f"scores.{suffix}"
    write_scores(path, scores)
    back = read_scores(path)
    assert back.event_id == scores.event_id
    assert back.decision == scores.decision
    assert back.reasons == scores.reasons
    assert np.array_equal(back.ts_s, scores.ts_s)
    assert np.array_equal(back.risk, np.round(scores.risk, 6))
    if optional:
        assert back.current_decision == scores.current_decision
        assert back.amount is not None
        assert scores.amount is not None
        assert np.array_equal(back.amount, scores.amount, equal_nan=True)
    else:
        assert back.current_decision is None
        assert back.amount is None


@pytest.mark.parametrize("suffix", SUFFIXES)
def test_chunked_scores_are_byte_identical(
    tmp_path: Path, suffix: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Small row groups so that chunks cross row-group boundaries in every way.
    monkeypatch.setattr(files_write, "ROW_GROUP_ROWS", 64)
    scores = invented_scores(1000)
    once, chunked = tmp_path / f"once.{suffix}", tmp_path / f"chunked.{suffix}"
    write_scores(once, scores)
    with ScoreWriter.open(chunked, with_current_decision=True, with_amount=True) as writer:
        for part in chunks(scores, [1, 0, 63, 64, 65, 200, 7, 600]):
            writer.write(part)
    assert once.read_bytes() == chunked.read_bytes()
    if suffix == "parquet":
        assert pq.ParquetFile(once).metadata.num_row_groups == 16  # 15 full groups of 64 + 40


def test_scores_csv_bytes(tmp_path: Path) -> None:
    """The exact text: ISO 8601 UTC with milliseconds and Z, six decimals, reasons as given."""
    scores = ScoreTable(
        ["e1", "e2"],
        np.array([1788256800.0, 1788256800.0625]),
        np.array([0.1234565, 1.0]),
        ["allow", "deny"],
        ["", "many accounts per device; new device"],
        current_decision=["allow", None],
    )
    path = tmp_path / "scores.csv"
    write_scores(path, scores)
    assert path.read_text(encoding="utf-8") == (
        '"event_id","ts","risk","decision","reasons","current_decision"\n'
        '"e1","2026-09-01T10:00:00.000Z",0.123456,"allow","","allow"\n'
        '"e2","2026-09-01T10:00:00.062Z",1.000000,"deny","many accounts per device; new device",\n'
    )


def test_risk_text_matches_python_format(tmp_path: Path) -> None:
    """Reference: Python's own "%.6f" formatting of the same floats."""
    risk = np.random.default_rng(9).random(5000)
    scores = ScoreTable(
        [f"e{i}" for i in range(5000)], np.full(5000, 1.8e9), risk, ["allow"] * 5000, [""] * 5000
    )
    path = tmp_path / "scores.csv"
    write_scores(path, scores)
    rows = list(csv.DictReader(io.StringIO(path.read_bytes().decode("utf-8"), newline="")))
    assert [r["risk"] for r in rows] == [f"{r:.6f}" for r in risk.tolist()]


def test_csv_output_reads_with_the_csv_module(tmp_path: Path) -> None:
    """Reference: Python's csv module reads our CSV back to the same text values."""
    events = invented_events(100)
    path = tmp_path / "events.csv"
    write_events(path, events)
    text = path.read_bytes().decode("utf-8")  # no newline translation: values hold \r
    rows = list(csv.DictReader(io.StringIO(text, newline="")))
    assert [r["account_id"] or None for r in rows] == events.account_id
    assert [r["event_id"] for r in rows] == events.event_id


def test_jsonl_output_reads_with_the_json_module(tmp_path: Path) -> None:
    """Reference: Python's json module parses every line to the same values."""
    events = invented_events(100)
    path = tmp_path / "events.jsonl"
    write_events(path, events)
    rows = [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]
    assert [r["account_id"] for r in rows] == events.account_id
    assert [r["amount"] for r in rows] == [None if np.isnan(a) else a for a in events.amount]
    assert list(rows[0]) == [
        "event_id", "ts", "type", "account_id", "ip", "device_id", "phone", "email", "amount",
        "current_decision",
    ]  # fmt: skip
    escaped = [json.dumps(v, ensure_ascii=False) for v in AWKWARD]
    text = path.read_text(encoding="utf-8")
    assert all(e in text for e in escaped)


def test_read_events_reads_the_sample_files() -> None:
    """tests/data/files/events_good.csv mixes Z, offsets, fractions and epoch seconds."""
    path = Path(__file__).parents[1] / "data" / "files" / "events_good.csv"
    table = read_events(path).table
    assert table.account_id[3] == "007"  # text stays text
    assert table.ts_s.tolist() == [
        1788256800.0, 1788256830.25, 1788256860.0, 1788256800.0, 1788256799.999,
    ]  # fmt: skip
    assert table.line.tolist() == [2, 3, 4, 5, 6]
    ordered = sort_events(table)
    assert ordered.event_id == ["ev-005", "ev-001", "ev-004", "ev-002", "ev-003"]
    assert ordered.line.tolist() == [6, 2, 5, 3, 4]


def test_large_csv_in_many_blocks(tmp_path: Path) -> None:
    """Enough rows for Arrow to read in several blocks and threads; order and lines hold."""
    events = invented_events(60_000)
    path = tmp_path / "events.csv"
    write_events(path, events)
    report = read_events(path)
    assert_events_equal(report.table, events)


@pytest.mark.parametrize("suffix", ["csv", "jsonl", "parquet"])
def test_empty_scores_round_trip(tmp_path: Path, suffix: str) -> None:
    """A backfill whose events were all rejected still writes a valid, empty scores file."""
    empty = ScoreTable([], np.zeros(0), np.zeros(0), [], [])
    path = tmp_path / f"scores.{suffix}"
    write_scores(path, empty)
    back = read_scores(path)
    assert len(back) == 0
    assert back.current_decision is None


def test_labels_jsonl_with_booleans_and_epoch_numbers(tmp_path: Path) -> None:
    path = tmp_path / "labels.jsonl"
    rows = [
        {"event_id": "a", "labeled_at": 1789000000, "is_fraud": True},
        {"event_id": "b", "labeled_at": 1789000000.5, "is_fraud": False},
    ]
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    table = read_labels(path).table
    assert table.labeled_at_s.tolist() == [1789000000.0, 1789000000.5]
    assert table.is_fraud.tolist() == [True, False]
