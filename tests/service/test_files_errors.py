"""Bad input: precise messages naming file, line and field; reject files; nothing half-written.

Privacy rule checked throughout: no raw identifier value (e-mail, phone, IP, device, account)
appears in a message or in a reject file.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service.files import (
    InputError,
    ScoreWriter,
    read_events,
    read_labels,
    read_scores,
    write_events,
    write_scores,
)
from service.tables import IDENTIFIER_FIELDS, EventTable, ScoreTable

DATA = Path(__file__).parents[1] / "data" / "files"
BAD = DATA / "events_bad.csv"
HEADER = "event_id,ts,type,account_id,ip,device_id,phone,email,amount,current_decision\n"
GOOD_ROW = "e1,2026-09-01T10:00:00Z,login,acct-1,192.0.2.1,dev-1,+12025550101,ana@example.com,,\n"


def identifier_values(path: Path) -> set[str]:
    rows = list(csv.DictReader(path.open(encoding="utf-8")))
    return {r[f] for r in rows for f in IDENTIFIER_FIELDS if r.get(f)}


def assert_private(text: str, secrets: set[str]) -> None:
    leaked = sorted(s for s in secrets if s in text)
    assert not leaked, f"raw identifier values leaked: {leaked}"


def copy_bad(tmp_path: Path) -> Path:
    path = tmp_path / "events.csv"
    shutil.copy(BAD, path)
    return path


# --- bad rows ----------------------------------------------------------------------------------


def test_default_raises_on_the_first_bad_row(tmp_path: Path) -> None:
    path = copy_bad(tmp_path)
    with pytest.raises(InputError) as caught:
        read_events(path)
    err = caught.value
    assert (err.path, err.line, err.field) == (str(path), 3, "ts")
    assert str(err) == (
        f"{path} line 3, field ts: not a time with a zone (add Z or an offset such as "
        "+02:00): '2026-09-01 10:00'"
    )


def test_reject_file_lists_every_bad_row(tmp_path: Path) -> None:
    path, rejects = copy_bad(tmp_path), tmp_path / "rejects.csv"
    report = read_events(path, reject_path=rejects)
    assert (report.rows_read, report.rows_rejected, report.reject_path) == (15, 12, rejects)
    assert report.table.event_id == ["e1", "e11", "e14"]
    assert report.table.line.tolist() == [2, 12, 15]
    expected = (DATA / "events_bad.rejects.csv").read_text(encoding="utf-8")
    assert rejects.read_text(encoding="utf-8") == expected
    assert_private(rejects.read_text(encoding="utf-8"), identifier_values(BAD))


def test_strict_raises_even_with_a_reject_file(tmp_path: Path) -> None:
    path, rejects = copy_bad(tmp_path), tmp_path / "rejects.csv"
    with pytest.raises(InputError, match="line 3, field ts"):
        read_events(path, strict=True, reject_path=rejects)
    assert not rejects.exists()


def test_messages_never_quote_identifiers(tmp_path: Path) -> None:
    """Every bad row of the sample, raised one at a time: no message carries an identifier."""
    path = copy_bad(tmp_path)
    secrets = identifier_values(BAD)
    lines = path.read_text(encoding="utf-8").splitlines(keepends=True)
    for number in range(2, len(lines) + 1):
        path.write_text(lines[0] + lines[number - 1], encoding="utf-8")
        try:
            read_events(path)
        except InputError as err:
            assert_private(str(err), secrets)


def test_wrong_field_count_names_the_line_not_the_text(tmp_path: Path) -> None:
    path = tmp_path / "events.csv"
    path.write_text(HEADER + GOOD_ROW + "e2,2026-09-01T10:00:00Z,login,acct-2,bo@example.com\n")
    with pytest.raises(InputError) as caught:
        read_events(path)
    assert str(caught.value) == f"{path} line 3: expected 10 fields, found 5"


def test_blank_lines_and_line_breaks_keep_line_numbers_true(tmp_path: Path) -> None:
    path = tmp_path / "events.csv"
    multi = 'e2,2026-09-01T10:00:00Z,login,"acct\n2",,,,,,\n'
    bad = "e3,2026-09-01T10:00:00Z,refund,acct-3,,,,,,\n"
    path.write_text(HEADER + "\n" + GOOD_ROW + "\n\n" + multi + bad)
    with pytest.raises(InputError) as caught:
        read_events(path)
    assert (caught.value.line, caught.value.field) == (8, "type")


def test_bad_row_deep_in_a_large_file(tmp_path: Path) -> None:
    """Arrow reads this in several blocks on several threads; the line must still be exact."""
    rows = [f"e{i},{1788256800 + i},login,acct-{i},,,,,,\n" for i in range(50_000)]
    rows[41_234] = "e41234,2026-09-01T10:00:00,login,acct,,,,,,\n"
    rows[45_000] = "e45000,2026-09-01T10:00:00Z\n"
    rows[49_000] = "e7,1788256800,login,acct,,,,,,\n"  # repeats line 9, in another block
    path = tmp_path / "events.csv"
    path.write_text(HEADER + "".join(rows))
    report = read_events(path, reject_path=tmp_path / "rejects.csv")
    assert report.rows_rejected == 3
    rejects = list(csv.DictReader((tmp_path / "rejects.csv").open()))
    assert [(r["line"], r["field"], r["reason"]) for r in rejects] == [
        ("41236", "ts", "not a time with a zone (add Z or an offset such as +02:00)"),
        ("45002", "", "expected 10 fields, found 2"),
        ("49002", "event_id", "duplicate of line 9, which is kept"),
    ]
    assert report.table.line[-1] == 50_001


def test_jsonl_bad_rows_name_their_lines(tmp_path: Path) -> None:
    good = {"event_id": "e1", "ts": "2026-09-01T10:00:00Z", "type": "login", "ip": "192.0.2.1"}
    lines = [
        json.dumps(good),
        "",
        json.dumps({**good, "event_id": "e2", "ts": 1788256800}),  # numbers and text mixed
        '{"event_id": "e3", "ts": ',  # not valid JSON
        json.dumps({**good, "event_id": "e4", "amount": "-3"}),
        json.dumps(["e5"]),
        json.dumps({**good, "event_id": "e6", "ip": {"v4": "192.0.2.6"}}),
    ]
    path, rejects = tmp_path / "events.jsonl", tmp_path / "rejects.csv"
    path.write_text("\n".join(lines) + "\n")
    report = read_events(path, reject_path=rejects)
    assert report.table.event_id == ["e1", "e2"]
    assert report.table.line.tolist() == [1, 3]
    found = [(r["line"], r["field"], r["reason"]) for r in csv.DictReader(rejects.open())]
    assert found == [
        ("4", "", "not valid JSON"),
        ("5", "amount", "is negative"),
        ("6", "", "not a JSON object"),
        ("7", "ip", "holds a list or object, not a single value"),
    ]
    assert_private(rejects.read_text(), {"192.0.2.6"})


def test_labels_accept_true_false_and_reject_others(tmp_path: Path) -> None:
    path = tmp_path / "labels.csv"
    path.write_text(
        "event_id,labeled_at,is_fraud\n"
        "a,2026-09-01T10:00:00Z,1\nb,2026-09-01T10:00:00Z,True\nc,2026-09-01T10:00:00Z,no\n"
        "a,2026-09-02T10:00:00Z,0\nd,2026-09-01T10:00:00Z,\n"
    )
    rejects = tmp_path / "rejects.csv"
    report = read_labels(path, reject_path=rejects)
    assert report.table.event_id == ["a", "b"]
    assert report.table.is_fraud.tolist() == [True, True]
    found = [(r["line"], r["field"], r["reason"]) for r in csv.DictReader(rejects.open())]
    assert found == [
        ("4", "is_fraud", "not 1/0 or true/false"),
        ("5", "event_id", "duplicate of line 2, which is kept"),
        ("6", "is_fraud", "is empty"),
    ]


def test_read_scores_raises_on_a_bad_risk(tmp_path: Path) -> None:
    path = tmp_path / "scores.csv"
    path.write_text("event_id,ts,risk,decision,reasons\ne1,2026-09-01T10:00:00Z,1.5,deny,\n")
    with pytest.raises(InputError, match=r"line 2, field risk: outside 0 to 1: '1.5'"):
        read_scores(path)


# --- file-level problems -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "content", "message"),
    [
        ("events.txt", "x", "unknown file extension .txt"),
        ("events.parquet.gz", "x", "unknown file extension .parquet.gz"),
        ("events.csv", "", "the file is empty: no events to read"),
        ("events.csv", "\n\n  \n", "the file is empty: no events to read"),
        ("events.jsonl", "\n", "the file is empty: no events to read"),
        ("events.csv", HEADER, "has column names but no rows: no events to read"),
        ("events.csv", "event_id,type,ip\ne1,login,192.0.2.1\n", "missing required columns: ts"),
        ("events.csv", "id,when,kind\n1,2,3\n", "missing required columns: event_id, ts, type"),
        ("events.csv", "event_id,ts,type,ts,ip\n", "column named more than once: ts"),
        ("events.csv", "event_id,ts,type\ne1,1788256800,login\n", "no identifier column"),
        ("events.jsonl", '{"event_id": "e1", "type": "login"}\n', "missing required columns: ts"),
        ("events.parquet", "not parquet at all", "not a readable Parquet file"),
        ("events.csv.gz", "not gzip", "not a readable gzip file"),
    ],
)
def test_file_level_problems(tmp_path: Path, name: str, content: str, message: str) -> None:
    path = tmp_path / name
    path.write_text(content)
    with pytest.raises(InputError, match=message) as caught:
        read_events(path)
    assert str(caught.value).startswith(str(path))


def test_missing_file_and_directory(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no such file"):
        read_events(tmp_path / "absent.csv")
    (tmp_path / "folder.csv").mkdir()
    with pytest.raises(InputError, match="is a directory"):
        read_events(tmp_path / "folder.csv")


def test_not_utf8_names_the_line(tmp_path: Path) -> None:
    path = tmp_path / "events.csv"
    path.write_bytes((HEADER + GOOD_ROW).encode() + b"e2,1788256800,login,caf\xe9,,,,,,\n")
    with pytest.raises(InputError, match="line 3: not UTF-8 text"):
        read_events(path)


def test_utf8_byte_order_mark_is_accepted(tmp_path: Path) -> None:
    path = tmp_path / "events.csv"
    path.write_bytes(b"\xef\xbb\xbf" + (HEADER + GOOD_ROW).encode())
    assert read_events(path).table.event_id == ["e1"]


def test_gzip_input(tmp_path: Path) -> None:
    path = tmp_path / "events.csv.gz"
    path.write_bytes(gzip.compress((HEADER + GOOD_ROW).encode()))
    assert read_events(path).table.email == ["ana@example.com"]


def test_parquet_column_types(tmp_path: Path) -> None:
    path = tmp_path / "events.parquet"
    base = {"event_id": ["e1"], "type": ["login"], "ip": ["192.0.2.1"]}
    naive = pa.array([1_788_256_800_000], pa.timestamp("ms"))
    pq.write_table(pa.table({**base, "ts": naive}), path)
    with pytest.raises(InputError, match="field ts: the column holds timestamps without a time"):
        read_events(path)
    pq.write_table(pa.table({**base, "ts": [{"a": 1}]}), path)
    with pytest.raises(InputError, match="field ts: the column has type struct"):
        read_events(path)
    ids = pa.array([7], pa.int64())
    pq.write_table(pa.table({**base, "event_id": ids, "ts": [1788256800.0]}), path)
    assert read_events(path).table.event_id == ["7"]


def test_parquet_bad_row_is_named_by_row(tmp_path: Path) -> None:
    path = tmp_path / "events.parquet"
    table = {"event_id": ["e1", "e2"], "ts": [1788256800.0, 1788256800.0]}
    pq.write_table(pa.table({**table, "type": ["login", "logout"], "ip": [None, None]}), path)
    with pytest.raises(InputError, match=r"events.parquet row 2, field type: unknown type"):
        read_events(path)


def test_empty_labels_file_means_no_labels(tmp_path: Path) -> None:
    for content in ("", "event_id,labeled_at,is_fraud\n"):
        path = tmp_path / "labels.csv"
        path.write_text(content)
        report = read_labels(path)
        assert (len(report.table), report.rows_read, report.rows_rejected) == (0, 0, 0)


# --- nothing half-written ----------------------------------------------------------------------


def small_scores(risk: list[float]) -> ScoreTable:
    n = len(risk)
    return ScoreTable([f"e{i}" for i in range(n)], np.full(n, 1.8e9), np.array(risk),
                      ["allow"] * n, [""] * n)  # fmt: skip


def test_failed_write_leaves_the_old_file(tmp_path: Path) -> None:
    path = tmp_path / "scores.csv"
    path.write_text("old content")
    with pytest.raises(ValueError, match="risk must be a probability"):
        write_scores(path, small_scores([0.1, float("nan")]))
    assert path.read_text() == "old content"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scores.csv"]


@pytest.mark.parametrize("suffix", ["csv", "jsonl", "parquet", "csv.gz"])
def test_score_writer_failing_mid_way_leaves_nothing(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"scores.{suffix}"
    writer = ScoreWriter.open(path)
    writer.write(small_scores([0.1, 0.2]))
    with pytest.raises(ValueError, match="risk"):
        writer.write(small_scores([2.0]))
    writer.close()  # after an abort, close has nothing left to do
    assert list(tmp_path.iterdir()) == []


def test_score_writer_context_aborts_on_error(tmp_path: Path) -> None:
    path = tmp_path / "scores.parquet"

    def backfill() -> None:
        with ScoreWriter.open(path) as writer:
            writer.write(small_scores([0.1]))
            raise RuntimeError("the backfill failed")

    with pytest.raises(RuntimeError):
        backfill()
    assert list(tmp_path.iterdir()) == []


def test_writer_refuses_a_chunk_without_a_promised_column(tmp_path: Path) -> None:
    writer = ScoreWriter.open(tmp_path / "s.csv", True)  # positional: (path, current, amount)
    with pytest.raises(ValueError, match="current_decision"):
        writer.write(small_scores([0.1]))
    assert list(tmp_path.iterdir()) == []


def test_write_to_a_missing_folder_or_bad_extension(tmp_path: Path) -> None:
    events = EventTable(["e1"], np.array([1.8e9]), ["login"], [None], ["192.0.2.1"], [None],
                        [None], [None], np.array([np.nan]), [None])  # fmt: skip
    with pytest.raises(InputError, match="cannot write here"):
        write_events(tmp_path / "absent" / "events.csv", events)
    with pytest.raises(InputError, match=r"unknown file extension \.xlsx"):
        write_events(tmp_path / "events.xlsx", events)
    assert list(tmp_path.iterdir()) == []


def test_reject_file_replaces_a_stale_one(tmp_path: Path) -> None:
    path, rejects = tmp_path / "events.csv", tmp_path / "rejects.csv"
    path.write_text(HEADER + GOOD_ROW)
    rejects.write_text("stale")
    report = read_events(path, reject_path=rejects)
    assert report.rows_rejected == 0
    assert rejects.read_text() == "line,event_id,field,reason\n"
    assert list(csv.reader(io.StringIO(rejects.read_text()))) == [
        ["line", "event_id", "field", "reason"]
    ]


def test_jsonl_blank_lines_on_the_fast_path(tmp_path: Path) -> None:
    """Consistent types, so Arrow reads it; blank lines must not shift the line numbers."""
    rows = [
        {"event_id": f"e{i}", "ts": "2026-09-01T10:00:00Z", "type": "login", "ip": "192.0.2.1"}
        for i in range(4)
    ]
    rows[2]["type"] = "logout"
    path = tmp_path / "events.jsonl"
    path.write_text("\n" + "\n\n".join(json.dumps(r) for r in rows) + "\n\n")
    with pytest.raises(InputError) as caught:
        read_events(path)
    assert (caught.value.line, caught.value.field) == (6, "type")
    assert "unknown type (expected one of signup, login, checkout): 'logout'" in str(caught.value)


def test_file_of_only_unparsable_lines(tmp_path: Path) -> None:
    path, rejects = tmp_path / "events.jsonl", tmp_path / "rejects.csv"
    path.write_text('not json\n{"event_id":\n')
    with pytest.raises(InputError, match="line 1: not valid JSON"):
        read_events(path)
    report = read_events(path, reject_path=rejects)
    assert (report.rows_read, report.rows_rejected, len(report.table)) == (2, 2, 0)
