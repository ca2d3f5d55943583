"""Format readers: CSV, JSON Lines and Parquet into raw Arrow columns plus the line of each row.

Nothing here judges values; it only gets the columns out of the file as faithfully as it can,
keeps text as text (an account id such as 007 stays "007"), and records where each row came
from. Rows that cannot be parsed at all (a CSV row with the wrong number of fields, a line that
is not a JSON object) become problems with their line, so that they can be rejected like any
other bad row.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.json as pa_json
import pyarrow.parquet as pq

from service.files_base import InputError, RowProblem, check_readable, format_of, read_bytes

_BOM = b"\xef\xbb\xbf"
_ARROW_ERRORS = (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError)


@dataclass(frozen=True)
class Columns:
    """Which columns a kind of file has; which hold text (never numbers) and which numbers."""

    kind: str
    required: tuple[str, ...]
    optional: tuple[str, ...] = ()
    text: tuple[str, ...] = ()
    numeric: tuple[str, ...] = ()

    @property
    def known(self) -> tuple[str, ...]:
        return self.required + self.optional


@dataclass
class RawRows:
    """The known columns found in a file, the line of each data row, and unparsable rows."""

    columns: dict[str, pa.Array] = field(default_factory=dict)
    lines: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    problems: list[RowProblem] = field(default_factory=list)
    empty: bool = False  # no header and no rows: nothing at all in the file

    @property
    def rows_read(self) -> int:
        return len(self.lines) + len(self.problems)


def read_rows(path: str | Path, spec: Columns) -> RawRows:
    """Read a file of any supported format; InputError for file-level problems."""
    fmt, gzipped = format_of(path)
    if fmt == "parquet":
        return _read_parquet(path, spec)
    raw = read_bytes(path, gzipped)
    if raw.startswith(_BOM):
        raw = raw[len(_BOM) :]
    if not raw or raw.isspace():  # isspace stops at the first other byte: no copy
        return RawRows(empty=True)
    if fmt == "csv":
        return _read_csv(path, raw, spec)
    return _read_jsonl(path, raw, spec)


def _require(path: str | Path, spec: Columns, names: list[str], hint: str) -> list[str]:
    """The known columns present; InputError naming missing or repeated ones."""
    repeated = sorted({n for n in names if n in spec.known and names.count(n) > 1})
    if repeated:
        raise InputError(path, f"column named more than once: {', '.join(repeated)}")
    missing = [c for c in spec.required if c not in names]
    if missing:
        raise InputError(path, f"missing required columns: {', '.join(missing)} ({hint})")
    return [c for c in spec.known if c in names]


def _flat(column: pa.ChunkedArray | pa.Array) -> pa.Array | pa.ChunkedArray:
    """The column without dictionary encoding; chunks are kept (combining them costs a copy)."""
    if isinstance(column, pa.ChunkedArray) and column.num_chunks == 1:
        column = column.chunk(0)
    if pa.types.is_dictionary(column.type):
        if isinstance(column, pa.ChunkedArray):
            column = column.combine_chunks()
        column = column.dictionary_decode()
    return column


def _trimmed(raw: bytes, blanks: bytes) -> tuple[int, int]:
    """Where the content starts and ends once leading and trailing `blanks` are left out."""
    start, end = 0, len(raw)
    while start < end and raw[start] in blanks:
        start += 1
    while end > start and raw[end - 1] in blanks:
        end -= 1
    return start, end


def _first_line(raw: bytes, blanks: bytes) -> bytes:
    start, end = _trimmed(raw, blanks)
    stop = raw.find(b"\n", start, end)
    return raw[start : end if stop < 0 else stop]


# --- CSV ---------------------------------------------------------------------------------------


def _csv_header(path: str | Path, raw: bytes) -> list[str]:
    first = _first_line(raw, b"\r\n")
    try:
        return next(csv.reader([first.decode("utf-8").rstrip("\r")]))
    except UnicodeDecodeError:
        raise InputError(path, "not UTF-8 text (save the file as UTF-8)", line=1) from None


def _read_csv(path: str | Path, raw: bytes, spec: Columns) -> RawRows:
    header = _csv_header(path, raw)
    present = _require(path, spec, header, "the first line must name the columns")
    table, invalid = _arrow_csv(path, raw, present, use_threads=True)
    if invalid and any(number is None for number, _ in invalid):
        # Arrow numbers invalid rows only when parsing on one thread.
        table, invalid = _arrow_csv(path, raw, present, use_threads=False)
    records = 1 + table.num_rows + len(invalid)
    line_of = _csv_record_lines(raw, records)
    good = np.ones(records + 1, dtype=bool)
    good[:2] = False  # no record 0; record 1 is the header
    good[[number for number, _ in invalid if number is not None]] = False
    good_records = np.flatnonzero(good)
    problems = [
        RowProblem(int(line_of[number]), None, f"expected {len(header)} fields, found {found}")
        for number, found in invalid
    ]
    columns = {c: _flat(table.column(c)) for c in present}
    return RawRows(columns, line_of[good_records], problems)


def _arrow_csv(
    path: str | Path, raw: bytes, present: list[str], *, use_threads: bool
) -> tuple[pa.Table, list[tuple[int | None, int]]]:
    invalid: list[tuple[int | None, int]] = []

    def skip(row: pa_csv.InvalidRow) -> str:
        invalid.append((row.number, row.actual_columns))
        return "skip"

    convert = pa_csv.ConvertOptions(
        column_types=dict.fromkeys(present, pa.string()),
        include_columns=present,
        strings_can_be_null=True,
        null_values=[""],
    )
    parse = pa_csv.ParseOptions(newlines_in_values=True, invalid_row_handler=skip)
    read = pa_csv.ReadOptions(use_threads=use_threads)
    try:
        table = pa_csv.read_csv(pa.py_buffer(raw), read, parse, convert)
    except _ARROW_ERRORS as exc:
        raise _csv_error(path, raw, exc) from None
    return table, invalid


def _csv_error(path: str | Path, raw: bytes, exc: Exception) -> InputError:
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as bad:
        line = raw.count(b"\n", 0, bad.start) + 1
        return InputError(path, "not UTF-8 text (save the file as UTF-8)", line=line)
    # Arrow's own message may quote a row, so only its kind is passed on.
    kind = str(exc).split(":", 1)[0]
    return InputError(path, f"cannot be read as CSV ({kind})")


def _csv_record_lines(raw: bytes, records: int) -> np.ndarray:
    """Physical line of each record (index 1 = header), counting blank lines Arrow skips."""
    start, end = _trimmed(raw, b"\r\n")
    lead = raw.count(b"\n", 0, start)
    if raw.count(b"\n", start, end) + 1 == records:  # no blank lines, no breaks inside values
        return np.arange(0, records + 1, dtype=np.int64) + lead
    starts = [0]
    reader = csv.reader(io.StringIO(raw.decode("utf-8", errors="replace"), newline=""))
    previous = 0
    for row in reader:
        if row:
            starts.append(previous + 1)
        previous = reader.line_num
    if len(starts) != records + 1:  # the two parsers disagree: fall back to record numbers
        return np.arange(0, records + 1, dtype=np.int64)
    return np.asarray(starts, dtype=np.int64)


# --- JSON Lines --------------------------------------------------------------------------------


def _read_jsonl(path: str | Path, raw: bytes, spec: Columns) -> RawRows:
    try:
        first = json.loads(_first_line(raw, b" \t\r\n"))
    except ValueError:
        first = None
    if not isinstance(first, dict):
        return _read_jsonl_slowly(path, raw, spec)
    schema = pa.schema([(c, _json_type(c, first.get(c), spec)) for c in spec.known])
    options = pa_json.ParseOptions(explicit_schema=schema, unexpected_field_behavior="ignore")
    try:
        table = pa_json.read_json(pa.BufferReader(raw), parse_options=options)
    except _ARROW_ERRORS:
        # Mixed types in a column, or a line that is not an object: the slow path says where.
        return _read_jsonl_slowly(path, raw, spec)
    columns = {c: _flat(table.column(c)) for c in spec.known}
    absent = [c for c in spec.known if c not in first and columns[c].null_count == len(table)]
    _require(path, spec, [c for c in spec.known if c not in absent], "no line has them")
    present = {c: a for c, a in columns.items() if c not in absent}
    lines = _json_lines(raw, table.num_rows)
    if lines is None:  # Arrow and a line count disagree: trust the line-by-line reader
        return _read_jsonl_slowly(path, raw, spec)
    return RawRows(present, lines)


def _json_type(name: str, sample: object, spec: Columns) -> pa.DataType:
    """The Arrow type to read a field as, so that Arrow never guesses timestamps from text."""
    if name in spec.text or isinstance(sample, str):
        return pa.string()
    if isinstance(sample, bool):
        return pa.bool_()
    if sample is None and name not in spec.numeric:
        return pa.string()
    return pa.float64()


def _json_lines(raw: bytes, rows: int) -> np.ndarray | None:
    """Line of each row: Arrow skips blank lines, so count only the others."""
    start, end = _trimmed(raw, b" \t\r\n")
    if start == 0 and raw.count(b"\n", 0, end) + 1 == rows:
        return np.arange(1, rows + 1, dtype=np.int64)
    found = [n for n, text in enumerate(raw.split(b"\n"), 1) if text.strip()]
    return np.asarray(found, dtype=np.int64) if len(found) == rows else None


def _read_jsonl_slowly(path: str | Path, raw: bytes, spec: Columns) -> RawRows:
    """Line by line with the json module: every value as text, every bad line as a problem."""
    values: dict[str, list[str | None]] = {c: [] for c in spec.known}
    seen: set[str] = set()
    lines: list[int] = []
    problems: list[RowProblem] = []
    for number, text in enumerate(raw.split(b"\n"), 1):
        if not text.strip():
            continue
        row, problem = _json_row(number, text, spec)
        if problem is not None:
            problems.append(problem)
            continue
        seen.update(row)
        lines.append(number)
        for c in spec.known:
            values[c].append(row.get(c))
    if lines:
        _require(path, spec, sorted(seen), "no line has them")
    columns = {c: pa.array(values[c], pa.string()) for c in spec.known if c in seen}
    empty = not lines and not problems
    return RawRows(columns, np.asarray(lines, dtype=np.int64), problems, empty=empty)


def _json_row(
    number: int, text: bytes, spec: Columns
) -> tuple[dict[str, str | None], RowProblem | None]:
    try:
        obj = json.loads(text)
    except ValueError:
        return {}, RowProblem(number, None, "not valid JSON")
    if not isinstance(obj, dict):
        return {}, RowProblem(number, None, "not a JSON object")
    row: dict[str, str | None] = {}
    for c in spec.known:
        if c not in obj:
            continue
        value = obj[c]
        if isinstance(value, dict | list):
            return {}, RowProblem(number, c, "holds a list or object, not a single value")
        row[c] = _json_text(value)
    return row, None


def _json_text(value: object) -> str | None:
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):  # positional, so that epoch seconds match the text pattern
        return np.format_float_positional(value, trim="-")
    return str(value)


# --- Parquet -----------------------------------------------------------------------------------


def _read_parquet(path: str | Path, spec: Columns) -> RawRows:
    p = check_readable(path)
    try:
        with pq.ParquetFile(p) as parquet:
            names = list(parquet.schema_arrow.names)
            present = _require(path, spec, names, "the file's schema must name them")
            table = parquet.read(columns=present)
    except InputError:
        raise
    except (*_ARROW_ERRORS, OSError) as exc:
        raise InputError(path, f"not a readable Parquet file ({exc})") from None
    columns = {c: _flat(table.column(c)) for c in present}
    return RawRows(columns, np.arange(1, table.num_rows + 1, dtype=np.int64))
