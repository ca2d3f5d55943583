"""Time parsing and formatting in files, checked against the standard library's datetime.

The conformance table tests/data/files/iso_times.csv names, per row, the rule it checks
(ISO 8601 or RFC 3339 section) and what `datetime.fromisoformat` itself does with the text.
"""

from __future__ import annotations

import csv
import doctest
import importlib
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.files_base import ColumnTypeError
from service.files_times import (
    EPOCH_OUT_OF_RANGE,
    NO_ZONE,
    NOT_A_TIME,
    OUT_OF_RANGE,
    format_iso_ms,
    parse_times,
)

TABLE = Path(__file__).parents[1] / "data" / "files" / "iso_times.csv"
ROWS = list(csv.DictReader(TABLE.open(encoding="utf-8")))


def _parse_one(text: str) -> tuple[float, str | None]:
    seconds, bad = parse_times(pa.array([text]))
    return float(seconds[0]), bad.get(0)


@pytest.mark.parametrize("row", ROWS, ids=[r["text"] for r in ROWS])
def test_iso_table_against_fromisoformat(row: dict[str, str]) -> None:
    """Source per row: the table's `source` column (ISO 8601, RFC 3339 sections 4.3-5.8)."""
    seconds, reason = _parse_one(row["text"])
    expect, reference = row["expect"], row["reference"] or row["text"].strip()
    if expect == "ok" and reference == "epoch":
        assert reason is None
        assert seconds == float(row["text"])
    elif expect == "ok":
        parsed = datetime.fromisoformat(reference)  # reference library: datetime
        assert parsed.tzinfo is not None
        assert reason is None
        assert seconds == parsed.timestamp()  # exact, not approximate
    elif expect == "no zone":
        assert reason == NO_ZONE
    elif expect == "range":
        assert reason in (OUT_OF_RANGE, EPOCH_OUT_OF_RANGE)
    else:
        assert reason == NOT_A_TIME or (reason or "").startswith("not a valid date or time")


@pytest.mark.parametrize("row", [r for r in ROWS if r["python"] != "-"], ids=lambda r: r["text"])
def test_iso_table_records_what_fromisoformat_does(row: dict[str, str]) -> None:
    """Pins the `python` column, so the places where we differ from the library stay known."""
    try:
        found = "accepts" if datetime.fromisoformat(row["text"]).tzinfo else "naive"
    except ValueError:
        found = "rejects"
    assert found == row["python"]


def test_epoch_milliseconds_are_named() -> None:
    _, reason = _parse_one("1788256800000")
    assert reason == EPOCH_OUT_OF_RANGE


def test_mixed_column_keeps_each_row_apart() -> None:
    values = pa.array(["2026-09-01T10:00:00Z", None, "1788256800.5", "", "2026-02-30T00:00:00Z"])
    seconds, bad = parse_times(values)
    assert seconds[0] == 1788256800.0
    assert seconds[2] == 1788256800.5
    assert set(bad) == {1, 3, 4}
    assert bad[1] == bad[3] == "is empty"
    assert np.isnan(seconds[[1, 3, 4]]).all()


def test_a_bad_date_in_a_large_block_does_not_disturb_the_others() -> None:
    """A failing Arrow cast sends its block row by row: the values must not change."""
    rng = np.random.default_rng(3)
    millis = 1_780_000_000_000 + rng.integers(0, 10**10, 70_000)
    text = format_iso_ms(millis / 1000).to_pylist()
    text[40_000] = "2026-02-30T00:00:00Z"
    seconds, bad = parse_times(pa.array(text))
    assert list(bad) == [40_000]
    keep = np.arange(len(text)) != 40_000
    assert np.array_equal(seconds[keep], (millis / 1000)[keep])


def test_chunked_column_parses_like_one_array() -> None:
    text = ["2026-09-01T10:00:00Z", "oops", "1788256800"]
    chunked = pa.chunked_array([text[:2], text[2:]])
    one, bad_one = parse_times(pa.array(text))
    two, bad_two = parse_times(chunked)
    assert np.array_equal(one, two, equal_nan=True)
    assert bad_one == bad_two


@pytest.mark.parametrize("unit", ["s", "ms", "us", "ns"])
def test_zoned_timestamp_columns(unit: str) -> None:
    stamps = pa.array([datetime(2026, 9, 1, 10, tzinfo=UTC)], pa.timestamp(unit, "UTC"))
    seconds, bad = parse_times(stamps)
    assert bad == {}
    assert seconds[0] == datetime(2026, 9, 1, 10, tzinfo=UTC).timestamp()


def test_naive_timestamp_column_is_refused() -> None:
    with pytest.raises(ColumnTypeError, match="without a time zone"):
        parse_times(pa.array([datetime(2026, 9, 1)], pa.timestamp("ms")))


def test_numbers_are_epoch_seconds() -> None:
    seconds, bad = parse_times(pa.array([1788256800, 4102444800 * 1000]))
    assert seconds[0] == 1788256800.0
    assert bad == {1: EPOCH_OUT_OF_RANGE}


def test_format_matches_datetime_isoformat() -> None:
    """Reference: datetime.isoformat(timespec="milliseconds"), ISO 8601 extended format."""
    rng = np.random.default_rng(5)
    millis = np.concatenate([[0, 951_782_400_000], rng.integers(0, 4_102_444_800_000, 2000)])
    ours = format_iso_ms(millis / 1000).to_pylist()
    for m, text in zip(millis.tolist(), ours, strict=True):
        reference = datetime.fromtimestamp(m / 1000, UTC).isoformat(timespec="milliseconds")
        assert text == reference.replace("+00:00", "Z")


def test_format_refuses_what_it_cannot_write() -> None:
    with pytest.raises(ValueError, match="finite"):
        format_iso_ms(np.array([np.nan]))
    with pytest.raises(ValueError, match="9999"):
        format_iso_ms(np.array([1e12]))


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 4_102_444_799_999), min_size=1, max_size=50))
def test_written_times_read_back_exactly(millis: list[int]) -> None:
    seconds = np.array(millis, dtype=np.int64) / 1000
    parsed, bad = parse_times(format_iso_ms(seconds))
    assert bad == {}
    assert np.array_equal(parsed, seconds)


@pytest.mark.parametrize(
    "module",
    ["service.files", "service.files_base", "service.files_times", "service.files_write"],
)
def test_docstring_examples_run(module: str) -> None:
    """pytest's --doctest-modules covers scoring/ only; these modules' examples run here."""
    result = doctest.testmod(importlib.import_module(module))
    assert result.failed == 0
