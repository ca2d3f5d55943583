"""Writers: tables to CSV, JSON Lines and Parquet, whole or streamed, always atomically.

Output is byte-for-byte deterministic: times are ISO 8601 UTC with milliseconds and ``Z``,
risk has exactly six decimals, floats are written in their shortest round-trip form, gzip
output carries no time stamp, and Parquet row groups have a fixed size whatever the chunking
of the writes. So writing in chunks gives the same bytes as writing at once.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable
from pathlib import Path
from types import TracebackType

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

from service.files_base import AtomicOutput, Format, format_of
from service.files_times import format_iso_ms, to_millis
from service.tables import EventTable, LabelTable, ScoreTable

ROW_GROUP_ROWS = 65_536
RISK_DECIMALS = 6
_RISK_TEXT = pa.decimal128(RISK_DECIMALS + 1, RISK_DECIMALS)
_TS_TYPED = pa.timestamp("ms", "UTC")
_NO_SEPARATOR = pa.scalar("", pa.large_string())
_NULL_LITERAL = pa.scalar("null", pa.large_string())


# --- columns -----------------------------------------------------------------------------------


def _texts(values: list[str] | list[str | None]) -> pa.Array:
    return pa.array(values, pa.string())


def _times(seconds: np.ndarray, text: bool) -> pa.Array:
    if text:
        return format_iso_ms(seconds)
    return pa.array(to_millis(seconds), _TS_TYPED)


def _floats(values: np.ndarray, field: str) -> pa.Array:
    values = np.asarray(values, dtype=np.float64)
    if np.isinf(values).any():
        raise ValueError(f"{field} must be finite or NaN (missing); found infinity")
    return pa.array(values, pa.float64(), from_pandas=True)  # NaN -> null


def _risks(risk: np.ndarray, text: bool) -> pa.Array:
    """Risk rounded to six decimals: exact decimals as text, the nearest float in Parquet."""
    risk = np.asarray(risk, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        if len(risk) and not np.all((risk >= 0) & (risk <= 1)):
            raise ValueError("risk must be a probability within 0..1 (found NaN or outside)")
    units = np.rint(risk * 10**RISK_DECIMALS).astype(np.int64)
    if not text:
        return pa.array(units / 10**RISK_DECIMALS, pa.float64())
    as_128 = np.stack([units, units >> 63], axis=1).astype("<i8").tobytes()
    return pa.Array.from_buffers(_RISK_TEXT, len(units), [None, pa.py_buffer(as_128)])


def events_arrow(table: EventTable, text: bool) -> pa.Table:
    """The columns written for events; `current_decision` only when some row has one."""
    columns = {
        "event_id": _texts(table.event_id),
        "ts": _times(table.ts_s, text),
        "type": _texts(table.type),
        "account_id": _texts(table.account_id),
        "ip": _texts(table.ip),
        "device_id": _texts(table.device_id),
        "phone": _texts(table.phone),
        "email": _texts(table.email),
        "amount": _floats(table.amount, "amount"),
    }
    if table.has_current_decision():
        columns["current_decision"] = _texts(table.current_decision)
    return pa.table(columns)


def labels_arrow(table: LabelTable, text: bool) -> pa.Table:
    """Labels; `is_fraud` as 1/0 in text formats and as a boolean in Parquet."""
    fraud = np.asarray(table.is_fraud, dtype=bool)
    return pa.table(
        {
            "event_id": _texts(table.event_id),
            "labeled_at": _times(table.labeled_at_s, text),
            "is_fraud": pa.array(fraud.astype(np.int8)) if text else pa.array(fraud),
        }
    )


def scores_schema(text: bool, with_current_decision: bool, with_amount: bool) -> pa.Schema:
    fields = [
        ("event_id", pa.string()),
        ("ts", pa.string() if text else _TS_TYPED),
        ("risk", _RISK_TEXT if text else pa.float64()),
        ("decision", pa.string()),
        ("reasons", pa.string()),
    ]
    if with_current_decision:
        fields.append(("current_decision", pa.string()))
    if with_amount:
        fields.append(("amount", pa.float64()))
    return pa.schema(fields)


def scores_arrow(table: ScoreTable, schema: pa.Schema, text: bool) -> pa.Table:
    columns = {
        "event_id": _texts(table.event_id),
        "ts": _times(table.ts_s, text),
        "risk": _risks(table.risk, text),
        "decision": _texts(table.decision),
        "reasons": _texts(table.reasons),
    }
    if "current_decision" in schema.names:
        if table.current_decision is None:
            raise ValueError("this scores file has a current_decision column; the chunk has none")
        columns["current_decision"] = _texts(table.current_decision)
    if "amount" in schema.names:
        if table.amount is None:
            raise ValueError("this scores file has an amount column; the chunk has none")
        columns["amount"] = _floats(table.amount, "amount")
    return pa.table(columns, schema=schema)


# --- JSON Lines --------------------------------------------------------------------------------


def json_lines(table: pa.Table) -> pa.Buffer:
    """One compact JSON object per row, keys in column order, each line ending in a newline.

    Text is escaped as ``json.dumps(value, ensure_ascii=False)`` escapes it; numbers are in
    their shortest round-trip form; a missing value is ``null``.
    """
    if table.num_rows == 0:
        return pa.py_buffer(b"")
    parts: list[pa.Array | pa.Scalar] = []
    for i, name in enumerate(table.column_names):
        key = ("{" if i == 0 else ",") + json.dumps(name) + ":"
        parts += [pa.scalar(key, pa.large_string()), _json_literals(table.column(name))]
    parts.append(pa.scalar("}\n", pa.large_string()))
    joined = pc.binary_join_element_wise(*parts, _NO_SEPARATOR)
    if isinstance(joined, pa.ChunkedArray):
        joined = joined.combine_chunks()
    offsets = np.frombuffer(joined.buffers()[1], dtype=np.int64)
    start, end = offsets[joined.offset], offsets[joined.offset + len(joined)]
    return joined.buffers()[2][start:end]


def _json_literals(column: pa.ChunkedArray | pa.Array) -> pa.Array:
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        literals = _json_strings(pc.cast(column, pa.large_string()))
    else:  # numbers and decimals: Arrow writes the shortest text that reads back equal
        literals = pc.cast(column, pa.large_string())
    return pc.fill_null(literals, _NULL_LITERAL)


def _json_strings(text: pa.Array) -> pa.Array:
    quote = pa.scalar('"', pa.large_string())
    quoted = pc.binary_join_element_wise(quote, text, quote, _NO_SEPARATOR)
    needs_escape = pc.fill_null(pc.match_substring_regex(text, '[\\x00-\\x1f"\\\\]'), False)
    if not pc.any(needs_escape).as_py():
        return quoted
    # Quotes, backslashes and control characters are rare: let the json module escape them.
    rows = np.flatnonzero(needs_escape.to_numpy(zero_copy_only=False))
    spelled = [json.dumps(text[int(i)].as_py(), ensure_ascii=False) for i in rows]
    return pc.replace_with_mask(quoted, needs_escape, pa.array(spelled, pa.large_string()))


# --- sinks -------------------------------------------------------------------------------------


class _Sink:
    """Writes Arrow tables of one schema to an open output in one format."""

    def __init__(self, fmt: Format, out: AtomicOutput, schema: pa.Schema) -> None:
        self.fmt = fmt
        self.out = out
        self.pending: list[pa.Table] = []
        self.pending_rows = 0
        self.csv: pa_csv.CSVWriter | None = None
        self.parquet: pq.ParquetWriter | None = None
        if fmt == "csv":
            options = pa_csv.WriteOptions(quoting_style="needed")
            self.csv = pa_csv.CSVWriter(out.stream, schema, write_options=options)
        elif fmt == "parquet":
            self.parquet = pq.ParquetWriter(out.stream, schema, compression="zstd")

    def write(self, table: pa.Table) -> None:
        if self.csv is not None:
            self.csv.write_table(table)
        elif self.parquet is None:
            self.out.stream.write(json_lines(table))
        else:
            self.pending.append(table)
            self.pending_rows += table.num_rows
            if self.pending_rows >= ROW_GROUP_ROWS:
                self._row_groups(final=False)

    def _row_groups(self, final: bool) -> None:
        """Write full row groups (and, when `final`, the remainder) of the pending rows."""
        assert self.parquet is not None
        table = pa.concat_tables(self.pending)
        full = table.num_rows if final else table.num_rows // ROW_GROUP_ROWS * ROW_GROUP_ROWS
        for start in range(0, full, ROW_GROUP_ROWS):
            group = table.slice(start, min(ROW_GROUP_ROWS, full - start))
            self.parquet.write_table(group, row_group_size=ROW_GROUP_ROWS)
        rest = table.slice(full)
        self.pending, self.pending_rows = [rest], rest.num_rows

    def discard(self) -> None:
        """Close the format writers without caring about their output (it is being dropped)."""
        for writer in (self.csv, self.parquet):
            if writer is not None:
                with contextlib.suppress(pa.ArrowException, OSError, ValueError):
                    writer.close()
        self.csv = self.parquet = None

    def finish(self) -> None:
        if self.csv is not None:
            self.csv.close()
        if self.parquet is not None:
            if self.pending:
                self._row_groups(final=True)
            self.parquet.close()


def write_whole(path: str | Path, build: Callable[[bool], pa.Table]) -> None:
    """Write one table to `path`; `build(text)` makes the columns for a text format or not."""
    fmt, gzipped = format_of(path)
    table = build(fmt != "parquet")  # values are checked before anything is opened
    out = AtomicOutput(path, gzipped)
    sink: _Sink | None = None
    try:
        sink = _Sink(fmt, out, table.schema)
        sink.write(table)
        sink.finish()
    except BaseException:
        if sink is not None:
            sink.discard()
        out.abort()
        raise
    out.commit()


class ScoreWriter:
    """Streams scores to a file in chunks, for the backfill; the file appears only on `close`.

    CSV and JSON Lines chunks are appended; Parquet is written in fixed-size row groups, so
    the bytes do not depend on how the scores were chunked.

    >>> import tempfile, numpy as np
    >>> from service.tables import ScoreTable
    >>> chunk = ScoreTable(["e1"], np.array([1788256800.0]), np.array([0.25]), ["allow"], [""])
    >>> path = Path(tempfile.mkdtemp()) / "scores.csv"
    >>> with ScoreWriter.open(path) as writer:
    ...     writer.write(chunk)
    >>> print(path.read_text(), end="")
    "event_id","ts","risk","decision","reasons"
    "e1","2026-09-01T10:00:00.000Z",0.250000,"allow",""
    """

    def __init__(
        self, path: str | Path, with_current_decision: bool = False, with_amount: bool = False
    ) -> None:
        fmt, gzipped = format_of(path)
        self._text = fmt != "parquet"
        self._schema = scores_schema(self._text, with_current_decision, with_amount)
        self._out = AtomicOutput(path, gzipped)
        try:
            self._sink = _Sink(fmt, self._out, self._schema)
        except BaseException:
            self._out.abort()
            raise

    @classmethod
    def open(
        cls, path: str | Path, with_current_decision: bool = False, with_amount: bool = False
    ) -> ScoreWriter:
        """A writer for `path`; the two flags add the optional columns."""
        return cls(path, with_current_decision=with_current_decision, with_amount=with_amount)

    def write(self, chunk: ScoreTable) -> None:
        """Append one chunk of scores; on error the partial output is removed."""
        try:
            self._sink.write(scores_arrow(chunk, self._schema, self._text))
        except BaseException:
            self.abort()
            raise

    def close(self) -> None:
        """Finish the file and move it into place."""
        if self._out.done:
            return
        try:
            self._sink.finish()
        except BaseException:
            self.abort()
            raise
        self._out.commit()

    def abort(self) -> None:
        """Drop everything written so far; the target path is left as it was."""
        if not self._out.done:
            self._sink.discard()
        self._out.abort()

    def __enter__(self) -> ScoreWriter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()
