"""Checkpoints of ``emberscore backfill``: a killed run resumes where it stopped.

The batch path runs in stages, and each stage's output is kept in the checkpoint folder as soon
as it exists, so a resumed run skips what is done:

==========================  =====================================================================
file                        what
==========================  =====================================================================
``manifest.json``           the run's digest: input files, settings and code (see `run_digest`)
``plan.npz``                the planned columns (identifier codes, buckets, flags, digests)
``learned.npz``             every model state published during the history, per-row version
``learned.msgpack``         label outcomes, pending labels and the final model snapshot
``scores-NNNNN.msgpack``    risk, decision and reasons of one chunk of rows
==========================  =====================================================================

Only numbers, text and bytes are stored (numpy ``.npz`` without pickle, msgpack), every file is
written under a temporary name, flushed to disk and renamed, so a kill leaves either the whole
file or none. A folder holding another run's checkpoint is refused, never mixed in. Feature
vectors are not kept (a million events would need hundreds of megabytes); a resumed run that
still has rows to score recomputes them, which is deterministic and takes seconds.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import uuid
from collections.abc import Iterable
from importlib import metadata
from pathlib import Path
from typing import Any

import msgpack
import numpy as np

from scoring.batch_plan import PlannedColumns
from service.files_base import InputError

FORMAT = 1
MANIFEST = "manifest.json"
_READ_BLOCK = 1 << 20
_PACKAGES = ("scoring", "service")


def code_version() -> str:
    """The package version and a digest of the source of every module that shapes the output.

    A resumed run must compute what the interrupted one did; an edited scoring module must not
    resume an old checkpoint, even at the same version number.
    """
    h = hashlib.sha256()
    try:
        h.update(metadata.version("emberscore").encode())
    except metadata.PackageNotFoundError:  # pragma: no cover - run from a source tree
        h.update(b"unknown")
    root = Path(__file__).resolve().parents[2]
    for package in _PACKAGES:
        for path in sorted((root / package).rglob("*.py")):
            h.update(str(path.relative_to(root)).encode())
            h.update(path.read_bytes())
    return h.hexdigest()


def _file_digest(h: Any, path: Path) -> None:
    h.update(f"{path.name}:{path.stat().st_size}:".encode())
    with path.open("rb") as handle:
        while block := handle.read(_READ_BLOCK):
            h.update(block)


def run_digest(files: Iterable[tuple[str, Path | None]], parameters: dict[str, object]) -> str:
    """Digest of the inputs of a run: named files (None: not given) and plain parameters."""
    h = hashlib.sha256()
    h.update(json.dumps({"format": FORMAT, **parameters}, sort_keys=True).encode())
    for role, path in files:
        h.update(f"\n{role}=".encode())
        if path is not None:
            _file_digest(h, path)
    return h.hexdigest()


class Checkpoint:
    """A checkpoint folder for one run (one digest).

    Use `open`: it creates the folder, or checks that what it holds belongs to this run.
    """

    def __init__(self, folder: Path, digest: str, resumed: bool) -> None:
        self.folder = folder
        self.digest = digest
        self.resumed = resumed

    @classmethod
    def open(cls, folder: str | Path, digest: str) -> Checkpoint:
        path = Path(folder)
        if path.exists() and not path.is_dir():
            raise InputError(path, "is a file; --checkpoint needs a folder")
        try:
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(
                path, f"cannot create the checkpoint folder ({exc.strerror})"
            ) from None
        manifest = path / MANIFEST
        if manifest.exists():
            held = cls._manifest_digest(manifest)
            if held != digest:
                raise InputError(
                    path,
                    "holds the checkpoint of a run with other input files, settings, "
                    "--checkpoint-every or program version; give another --checkpoint folder, "
                    "or delete this one to start over",
                )
            return cls(path, digest, resumed=True)
        if any(path.iterdir()):
            raise InputError(
                path, "is not empty and holds no backfill checkpoint; give an empty or new folder"
            )
        checkpoint = cls(path, digest, resumed=False)
        checkpoint._write(MANIFEST, json.dumps({"format": FORMAT, "digest": digest}).encode())
        return checkpoint

    @staticmethod
    def _manifest_digest(manifest: Path) -> str | None:
        try:
            held = json.loads(manifest.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(held, dict) or held.get("format") != FORMAT:
            return None
        digest = held.get("digest")
        return digest if isinstance(digest, str) else None

    # -- files ------------------------------------------------------------------------------

    def has(self, name: str) -> bool:
        return (self.folder / name).is_file()

    def _write(self, name: str, data: bytes) -> None:
        """Write a whole file under a temporary name, flush it to disk, then rename it."""
        target = self.folder / name
        tmp = self.folder / f".{name}.{uuid.uuid4().hex}.part"
        try:
            with tmp.open("wb") as handle:
                handle.write(data)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, target)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise InputError(target, f"cannot write the checkpoint ({exc.strerror})") from None

    def _read(self, name: str) -> bytes:
        try:
            return (self.folder / name).read_bytes()
        except OSError as exc:
            raise self.damaged(name, str(exc.strerror)) from None

    def damaged(self, name: str, why: str) -> InputError:
        return InputError(
            self.folder / name,
            f"checkpoint file is damaged ({why}); delete the folder to start over",
        )

    def save_arrays(self, name: str, arrays: dict[str, np.ndarray]) -> None:
        """Numeric arrays as an uncompressed ``.npz`` (no pickled objects)."""
        tmp = self.folder / f".{name}.{uuid.uuid4().hex}.part"
        named: dict[str, Any] = dict(arrays)
        try:
            with tmp.open("wb") as handle:
                np.savez(handle, **named)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, self.folder / name)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise InputError(self.folder / name, f"cannot write ({exc.strerror})") from None

    def load_arrays(self, name: str) -> dict[str, np.ndarray]:
        try:
            with np.load(self.folder / name, allow_pickle=False) as held:
                return {key: held[key] for key in held.files}
        except (OSError, ValueError, KeyError) as exc:
            raise self.damaged(name, str(exc)) from None

    def save_msgpack(self, name: str, value: object) -> None:
        self._write(name, bytes(msgpack.packb(value, use_bin_type=True)))

    def load_msgpack(self, name: str) -> Any:
        try:
            return msgpack.unpackb(self._read(name), raw=False, strict_map_key=False)
        except (ValueError, msgpack.ExtraData) as exc:
            raise self.damaged(name, str(exc)) from None

    def clear(self) -> None:
        """Remove this run's files, then the folder if nothing else is left in it."""
        for path in self.folder.iterdir():
            ours = path.name == MANIFEST or path.name.startswith(("plan.", "learned.", "scores-"))
            interrupted = path.name.startswith(".") and ".part" in path.name
            if path.is_file() and (ours or interrupted):
                path.unlink(missing_ok=True)
        with contextlib.suppress(OSError):  # something of the user's is in there: leave it
            self.folder.rmdir()


# --- planned columns ---------------------------------------------------------------------------


def plan_arrays(cols: PlannedColumns) -> dict[str, np.ndarray]:
    """Planned columns as named numeric arrays (digests as a bytes matrix per kind)."""
    out = {
        "ts_s": cols.ts_s,
        "type_index": cols.type_index,
        "amount": cols.amount,
        "flags": cols.flags,
        "sampled": cols.sampled,
    }
    for kind in cols.ids:
        out[f"ids.{kind}"] = cols.ids[kind]
        out[f"buckets.{kind}"] = cols.buckets[kind]
        digests = cols.digests[kind]
        width = len(digests[0]) if digests else 0
        matrix = np.frombuffer(b"".join(digests), dtype=np.uint8).reshape(len(digests), width)
        out[f"digests.{kind}"] = matrix
    return out


def plan_from_arrays(arrays: dict[str, np.ndarray]) -> PlannedColumns:
    """Inverse of `plan_arrays`."""
    kinds = [key.split(".", 1)[1] for key in arrays if key.startswith("ids.")]
    return PlannedColumns(
        ts_s=arrays["ts_s"],
        type_index=arrays["type_index"],
        amount=arrays["amount"],
        flags=arrays["flags"],
        ids={k: arrays[f"ids.{k}"] for k in kinds},
        buckets={k: arrays[f"buckets.{k}"] for k in kinds},
        digests={k: [bytes(row) for row in arrays[f"digests.{k}"]] for k in kinds},
        sampled=arrays["sampled"],
    )


def chunk_name(number: int) -> str:
    return f"scores-{number:05d}.msgpack"


def chunk_payload(
    start: int, risk: np.ndarray, decision: list[str], reasons: list[str]
) -> dict[str, object]:
    """One chunk's scores as msgpack-ready values (risk as raw float64 bytes: exact)."""
    return {
        "start": start,
        "risk": np.ascontiguousarray(risk, dtype="<f8").tobytes(),
        "decision": decision,
        "reasons": reasons,
    }


def chunk_from_payload(
    payload: Any, start: int, rows: int
) -> tuple[np.ndarray, list[str], list[str]]:
    """Inverse of `chunk_payload`, checked against the rows the chunk must cover."""
    ok = (
        isinstance(payload, dict)
        and payload.get("start") == start
        and isinstance(payload.get("risk"), bytes)
        and len(payload["risk"]) == 8 * rows
        and len(payload.get("decision", ())) == rows
        and len(payload.get("reasons", ())) == rows
    )
    if not ok:
        raise ValueError(f"chunk at row {start} does not hold {rows} scores")
    risk = np.frombuffer(payload["risk"], dtype="<f8").astype(np.float64)
    return risk, list(payload["decision"]), list(payload["reasons"])
