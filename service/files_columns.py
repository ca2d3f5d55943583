"""Vectorised checks and conversions for the columns of events, labels and scores files.

Each function takes one Arrow column (whatever type the file gave) and the line of each row,
and returns clean values plus a `RowProblem` for every bad row. The checks run on whole columns
with Arrow compute and numpy; Python loops run over the bad rows only, to word the problems.
Identifier columns are never judged here: a garbage identifier is the scorer's to flag.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from service.files_base import ColumnTypeError, RowProblem, shown_value
from service.files_times import parse_times

EMPTY = "is empty"
NUMBER_PATTERN = r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$"
_FLAG_TEXT = {"1": True, "0": False, "true": True, "false": False}


def problems_at(
    rows: Iterable[int | np.integer],
    lines: np.ndarray,
    field: str,
    reason: str,
    shown_from: pa.Array | None = None,
) -> list[RowProblem]:
    """One problem per row index; `shown_from` gives the value to quote (never an identifier)."""
    return [
        RowProblem(
            line=int(lines[i]),
            field=field,
            reason=reason,
            shown=None if shown_from is None else shown_value(shown_from[int(i)].as_py()),
        )
        for i in rows
    ]


def as_text(values: pa.Array) -> pa.Array:
    """The column as Arrow strings, "" as null. Numbers and booleans become their text."""
    t = values.type
    if pa.types.is_dictionary(t):
        return as_text(values.dictionary_decode())
    if pa.types.is_large_string(t) or pa.types.is_null(t):
        values = pc.cast(values, pa.string())
    elif not pa.types.is_string(t):
        if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)):
            raise ColumnTypeError(f"has type {t}; expected text")
        values = pc.cast(values, pa.string())
    return pc.if_else(pc.equal(values, ""), pa.scalar(None, pa.string()), values)


def text_list(values: pa.Array | None, keep: np.ndarray | None, rows: int) -> list[str | None]:
    """The column as the tables hold text: str or None, only the rows in `keep` (all if None).

    `rows` is the number of rows kept, used when the column is absent (all None).
    """
    if values is None:
        return [None] * rows
    values = as_text(values)
    if keep is not None:
        values = values.filter(pa.array(keep))
    return list(values.to_pylist())


def kept(values: list[str | None], keep: np.ndarray | None) -> list[str | None]:
    """The items of a list at the rows in `keep` (all of them if None)."""
    if keep is None:
        return values
    return [v for v, k in zip(values, keep.tolist(), strict=True) if k]


def event_ids(values: pa.Array, lines: np.ndarray) -> tuple[list[str | None], list[RowProblem]]:
    """The event ids as a list; a problem for each empty one and each repeat after the first."""
    ids = as_text(values)
    ids_list: list[str | None] = ids.to_pylist()
    return ids_list, _event_id_problems(ids, ids_list, lines)


def _event_id_problems(
    ids: pa.Array, ids_list: list[str | None], lines: np.ndarray
) -> list[RowProblem]:
    # A set of the list the caller needs anyway is the fastest proof of "no repeats".
    blank = pc.fill_null(pc.match_substring_regex(ids, r"^\s*$"), True)
    blank_rows = np.flatnonzero(blank.to_numpy(zero_copy_only=False))
    problems = problems_at(blank_rows, lines, "event_id", EMPTY)
    if len(set(ids_list)) == len(ids_list):
        return problems
    present = pc.if_else(blank, pa.scalar(None, pa.string()), ids)
    if isinstance(present, pa.ChunkedArray):  # one dictionary for the whole column
        present = present.combine_chunks()
    codes = pc.dictionary_encode(present)
    code_np = np.asarray(
        pc.fill_null(codes.indices, -1).to_numpy(zero_copy_only=False), dtype=np.int64
    )
    unique, first = np.unique(code_np, return_index=True)
    first_of = np.full(int(code_np.max()) + 2, -1, dtype=np.int64)
    first_of[unique + 1] = first
    first_row = first_of[code_np + 1]
    repeats = np.flatnonzero((code_np >= 0) & (first_row != np.arange(len(code_np))))
    for i in repeats:
        first_line = int(lines[first_row[i]])
        problems.append(
            RowProblem(int(lines[i]), "event_id", f"duplicate of line {first_line}, which is kept")
        )
    return problems


def times(values: pa.Array, lines: np.ndarray, field: str) -> tuple[np.ndarray, list[RowProblem]]:
    """Epoch seconds per row (see `service.files_times`), NaN where bad."""
    seconds, bad = parse_times(values)
    problems = [
        RowProblem(
            line=int(lines[i]),
            field=field,
            reason=reason,
            shown=None if reason == EMPTY else shown_value(values[i].as_py()),
        )
        for i, reason in sorted(bad.items())
    ]
    return seconds, problems


def choice(
    values: pa.Array | None,
    lines: np.ndarray,
    field: str,
    allowed: tuple[str, ...],
    *,
    required: bool,
) -> tuple[pa.Array, list[RowProblem]]:
    """Text that must be one of `allowed` (trimmed); empty is a problem only when `required`."""
    if values is None:
        return pa.nulls(len(lines), pa.string()), []
    text = as_text(values)
    text = as_text(pc.utf8_trim_whitespace(text))
    known = pc.is_in(text, value_set=pa.array(allowed, pa.string()))
    unknown = pc.and_(pc.invert(known), pc.is_valid(text)).to_numpy(zero_copy_only=False)
    reason = f"unknown {field} (expected one of {', '.join(allowed)})"
    problems = problems_at(np.flatnonzero(unknown), lines, field, reason, text)
    if required:
        missing = np.flatnonzero(text.is_null().to_numpy(zero_copy_only=False))
        problems += problems_at(missing, lines, field, EMPTY)
    return text, problems


def numbers(
    values: pa.Array | None, lines: np.ndarray, field: str, *, required: bool
) -> tuple[np.ndarray, list[RowProblem]]:
    """Finite float64 per row, NaN where empty; numbers given as text are parsed."""
    if values is None:
        return np.full(len(lines), np.nan), []
    t = values.type
    if pa.types.is_dictionary(t):
        return numbers(values.dictionary_decode(), lines, field, required=required)
    problems: list[RowProblem] = []
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_null(t):
        text = as_text(pc.utf8_trim_whitespace(pc.cast(values, pa.string())))
        numeric = pc.fill_null(pc.match_substring_regex(text, NUMBER_PATTERN), False)
        not_number = pc.and_(pc.is_valid(text), pc.invert(numeric))
        bad_rows = np.flatnonzero(not_number.to_numpy(zero_copy_only=False))
        problems += problems_at(bad_rows, lines, field, "not a number", text)
        values = pc.cast(pc.if_else(numeric, text, pa.scalar(None, pa.string())), pa.float64())
    elif not (pa.types.is_integer(t) or pa.types.is_floating(t)):
        raise ColumnTypeError(f"has type {t}; expected numbers")
    floats = np.array(  # a copy: Arrow's zero-copy view is read-only
        pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64
    )
    problems += problems_at(np.flatnonzero(np.isinf(floats)), lines, field, "not a finite number")
    floats[np.isinf(floats)] = np.nan
    if required:
        failed = {p.line for p in problems}
        empty = [i for i in np.flatnonzero(np.isnan(floats)) if int(lines[i]) not in failed]
        problems += problems_at(empty, lines, field, EMPTY)
    return floats, problems


def amounts(values: pa.Array | None, lines: np.ndarray) -> tuple[np.ndarray, list[RowProblem]]:
    """Non-negative amounts, NaN where empty."""
    floats, problems = numbers(values, lines, "amount", required=False)
    with np.errstate(invalid="ignore"):
        negative = np.flatnonzero(floats < 0)
    problems += problems_at(negative, lines, "amount", "is negative", pa.array(floats))
    floats[negative] = np.nan
    return floats, problems


def unit_interval(
    values: pa.Array | None, lines: np.ndarray, field: str
) -> tuple[np.ndarray, list[RowProblem]]:
    """Required numbers within 0..1 (a probability)."""
    floats, problems = numbers(values, lines, field, required=True)
    with np.errstate(invalid="ignore"):
        outside = np.flatnonzero((floats < 0) | (floats > 1))
    problems += problems_at(outside, lines, field, "outside 0 to 1", pa.array(floats))
    return floats, problems


def flags(
    values: pa.Array | None, lines: np.ndarray, field: str
) -> tuple[np.ndarray, list[RowProblem]]:
    """Required yes/no values: 1/0 or true/false (any case), or booleans."""
    if values is None:
        return np.zeros(len(lines), dtype=bool), problems_at(range(len(lines)), lines, field, EMPTY)
    t = values.type
    if pa.types.is_boolean(t):
        text = pc.cast(values, pa.string())
    elif pa.types.is_integer(t) or pa.types.is_floating(t):
        as_int = pc.cast(pc.cast(values, pa.float64()), pa.string())
        text = pc.replace_substring_regex(as_int, r"^(\d+)\.0*$", r"\1")
    else:
        text = pc.utf8_lower(pc.utf8_trim_whitespace(as_text(values)))
    text = as_text(text)
    known = pc.is_in(text, value_set=pa.array(list(_FLAG_TEXT), pa.string()))
    bad = pc.and_(pc.is_valid(text), pc.invert(known)).to_numpy(zero_copy_only=False)
    problems = problems_at(np.flatnonzero(bad), lines, field, "not 1/0 or true/false", values)
    missing = np.flatnonzero(text.is_null().to_numpy(zero_copy_only=False))
    problems += problems_at(missing, lines, field, EMPTY)
    truthy = pc.is_in(text, value_set=pa.array(["1", "true"], pa.string()))
    return np.asarray(
        pc.fill_null(truthy, False).to_numpy(zero_copy_only=False), dtype=bool
    ), problems
