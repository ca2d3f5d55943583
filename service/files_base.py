"""What every file reader and writer shares: the error type, formats, safe reading and writing.

`InputError` is the one exception a user sees for a bad file. Rows that fail validation become
`RowProblem` values first; `settle` then either raises the first one or writes them all to a
reject file, so that nothing is lost silently. Reject files and messages never carry the raw
value of an identifier field (DESIGN.md tenet 7): only line, field and what is wrong.
"""

from __future__ import annotations

import csv
import gzip
import io
import os
import uuid
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Generic, Literal, TypeVar, cast

Format = Literal["csv", "jsonl", "parquet"]
_EXTENSIONS: dict[str, Format] = {
    ".csv": "csv",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".parquet": "parquet",
}
_GZIP_FORMATS = ("csv", "jsonl")
REJECT_COLUMNS = ("line", "event_id", "field", "reason")
_SHOWN_MAX_CHARS = 60

T = TypeVar("T")


class InputError(Exception):
    """A file the user gave (or asked for) cannot be used; the message says where and why.

    `line` is 1-based (see `EventTable.line` for how it counts) or None for a file-level
    problem; `field` names the column or None.
    """

    def __init__(
        self, path: str | Path, reason: str, *, line: int | None = None, field: str | None = None
    ) -> None:
        self.path = str(path)
        self.line = line
        self.field = field
        self.reason = reason
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = self.path
        if self.line is not None:
            unit = "row" if self.path.lower().endswith(".parquet") else "line"
            where += f" {unit} {self.line}"
        if self.field is not None:
            where += f", field {self.field}"
        return f"{where}: {self.reason}"


class ColumnTypeError(Exception):
    """A whole column has a type that cannot hold its values (the caller adds path and field)."""


@dataclass(frozen=True)
class RowProblem:
    """One thing wrong with one row. `reason` never holds a value; `shown` is the offending value
    of a non-identifier field, used in exception messages only, never in a file."""

    line: int
    field: str | None
    reason: str
    shown: str | None = None
    event_id: str = ""

    def message(self) -> str:
        if self.shown is None:
            return self.reason
        return f"{self.reason}: {self.shown!r}"


@dataclass(frozen=True)
class ReadReport(Generic[T]):
    """What a reader returns: the good rows, how many data rows the file held (good and bad),
    how many were rejected, and where the reject file was written (None when not asked for)."""

    table: T
    rows_read: int
    rows_rejected: int
    reject_path: Path | None


def shown_value(value: object) -> str:
    """The text of a non-identifier value, cut short so that a message stays one line."""
    text = str(value)
    if len(text) > _SHOWN_MAX_CHARS:
        return text[:_SHOWN_MAX_CHARS] + "..."
    return text


def format_of(path: str | Path) -> tuple[Format, bool]:
    """The file format chosen by the extension, and whether the file is gzip-compressed."""
    name = Path(path).name.lower()
    gzipped = name.endswith(".gz")
    if gzipped:
        name = name[: -len(".gz")]
    fmt = _EXTENSIONS.get(Path(name).suffix)
    if fmt is None or (gzipped and fmt not in _GZIP_FORMATS):
        suffix = "".join(Path(path).suffixes[-2:]) or "(none)"
        raise InputError(
            path,
            f"unknown file extension {suffix}: use .csv, .jsonl, .ndjson or .parquet "
            "(.csv.gz and .jsonl.gz are read and written compressed)",
        )
    return fmt, gzipped


def check_readable(path: str | Path) -> Path:
    """`path` as a Path, or InputError when it is missing, a directory or not readable."""
    p = Path(path)
    if not p.exists():
        raise InputError(path, "no such file")
    if p.is_dir():
        raise InputError(path, "is a directory, not a file")
    if not os.access(p, os.R_OK):
        raise InputError(path, "permission denied (not readable)")
    return p


def read_bytes(path: str | Path, gzipped: bool) -> bytes:
    """The whole content of a text file, decompressed when it is gzip."""
    p = check_readable(path)
    try:
        raw = p.read_bytes()
        return gzip.decompress(raw) if gzipped else raw
    except (gzip.BadGzipFile, EOFError, zlib.error) as exc:
        raise InputError(path, f"not a readable gzip file ({exc})") from None
    except OSError as exc:
        raise InputError(path, f"cannot read the file ({exc.strerror})") from None


class AtomicOutput:
    """A file written under a temporary name and renamed into place by `commit`.

    Until `commit`, the target path is untouched; `abort` removes the temporary file. So an
    error half-way leaves either the old file or no file, never a partial one.
    """

    def __init__(self, path: str | Path, gzipped: bool = False) -> None:
        self.path = Path(path)
        self._tmp = self.path.with_name(f".{self.path.name}.{uuid.uuid4().hex}.part")
        try:
            self._raw: IO[bytes] = open(self._tmp, "wb")  # noqa: SIM115 (closed in commit/abort)
        except OSError as exc:
            raise InputError(path, f"cannot write here ({exc.strerror})") from None
        # mtime=0 and no file name keep compressed output byte-for-byte reproducible; level 6
        # is gzip's own default, much faster than Python's 9 for little size.
        self.stream: IO[bytes] = self._raw
        if gzipped:
            zipped = gzip.GzipFile("", "wb", 6, self._raw, mtime=0)
            self.stream = cast(IO[bytes], zipped)
        self.done = False

    def commit(self) -> None:
        if self.done:
            return
        self.done = True
        if self.stream is not self._raw:
            self.stream.close()
        self._raw.close()
        os.replace(self._tmp, self.path)

    def abort(self) -> None:
        if self.done:
            return
        self.done = True
        try:
            if self.stream is not self._raw:
                self.stream.close()
            self._raw.close()
        finally:
            self._tmp.unlink(missing_ok=True)


def write_rejects(path: str | Path, problems: list[RowProblem]) -> None:
    """The reject file: one CSV row per problem, ordered by line; never a raw value."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(REJECT_COLUMNS)
    for p in sorted(problems, key=lambda p: p.line):
        writer.writerow([p.line, p.event_id, p.field or "", p.reason])
    out = AtomicOutput(path)
    try:
        out.stream.write(buffer.getvalue().encode("utf-8"))
    except BaseException:
        out.abort()
        raise
    out.commit()


def settle(
    path: str | Path,
    problems: list[RowProblem],
    *,
    strict: bool,
    reject_path: str | Path | None,
) -> int:
    """Raise on the first problem, or write the reject file; the number of rows rejected.

    Raises unless a reject file was asked for and `strict` is off, so that no bad row is ever
    dropped without a trace. The reject file is written even when empty, so that a stale one
    from an earlier run never survives.
    """
    if problems and (strict or reject_path is None):
        first = min(problems, key=lambda p: p.line)
        raise InputError(path, first.message(), line=first.line, field=first.field)
    if reject_path is not None:
        write_rejects(reject_path, problems)
    return len({p.line for p in problems})
