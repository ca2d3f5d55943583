"""Print read and write speeds of the events and scores files, per format.

Usage: ``.venv/bin/python loadtest/bench_files.py [rows] [--keep DIR]``

All data is invented: random ids, documentation-range IP addresses (RFC 5737) and example.com
e-mail addresses. Reading counts read + validate + sort, as the backfill does; writing scores
counts `write_scores` at once and `ScoreWriter` fed in chunks of 50,000 rows.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from service.files import (
    EVENT_TYPES,
    ScoreWriter,
    read_events,
    sort_events,
    write_events,
    write_scores,
)
from service.tables import EventTable, ScoreTable

FORMATS = ("csv", "jsonl", "parquet", "csv.gz")
CHUNK_ROWS = 50_000


def invented_events(rows: int, seed: int = 7) -> EventTable:
    rng = np.random.default_rng(seed)
    # Mostly in time order with some late arrivals, as a real export tends to be.
    ts = 1_788_000_000 + np.sort(rng.integers(0, 30 * 86_400_000, rows)) / 1000
    late = rng.random(rows) < 0.05
    ts[late] -= rng.integers(1, 3_600_000, int(late.sum())) / 1000
    kinds = np.array(EVENT_TYPES, dtype=object)[rng.integers(0, len(EVENT_TYPES), rows)]
    acct = rng.integers(0, 200_000, rows)
    return EventTable(
        event_id=[f"ev-{i:09d}" for i in range(rows)],
        ts_s=np.round(ts, 3),
        type=kinds.tolist(),
        account_id=[f"acct-{a}" for a in acct.tolist()],
        ip=[f"198.51.100.{a % 250}" if a % 3 else None for a in acct.tolist()],
        device_id=[f"dev-{a * 7 % 99991:05d}" for a in acct.tolist()],
        phone=[f"+1202555{a % 10000:04d}" if a % 4 else None for a in acct.tolist()],
        email=[f"user{a}@example.com" for a in acct.tolist()],
        amount=np.where(kinds == "checkout", np.round(rng.random(rows) * 300, 2), np.nan),
        current_decision=np.array(["allow", "review", "deny"], dtype=object)[
            rng.integers(0, 3, rows)
        ].tolist(),
    )


def invented_scores(events: EventTable, seed: int = 8) -> ScoreTable:
    rng = np.random.default_rng(seed)
    risk = rng.random(len(events))
    decision = np.where(risk > 0.9, "deny", np.where(risk > 0.6, "review", "allow"))
    return ScoreTable(
        event_id=events.event_id,
        ts_s=events.ts_s,
        risk=risk,
        decision=decision.tolist(),
        reasons=["new device; many accounts per device" if r > 0.6 else "" for r in risk],
        current_decision=events.current_decision,
        amount=events.amount,
    )


def timed(action: Callable[[], object]) -> tuple[float, float]:
    """Wall-clock and CPU seconds (CPU summed over threads) of one call."""
    wall, cpu = time.perf_counter(), time.process_time()
    action()
    return time.perf_counter() - wall, time.process_time() - cpu


def chunked(path: Path, scores: ScoreTable) -> None:
    with ScoreWriter.open(path, with_current_decision=True, with_amount=True) as writer:
        for start in range(0, len(scores), CHUNK_ROWS):
            stop = start + CHUNK_ROWS
            writer.write(
                ScoreTable(
                    scores.event_id[start:stop],
                    scores.ts_s[start:stop],
                    scores.risk[start:stop],
                    scores.decision[start:stop],
                    scores.reasons[start:stop],
                    None
                    if scores.current_decision is None
                    else scores.current_decision[start:stop],
                    None if scores.amount is None else scores.amount[start:stop],
                )
            )


def bench(rows: int, folder: Path) -> None:
    events = invented_events(rows)
    scores = invented_scores(events)
    print(f"{rows:,} rows; wall and CPU seconds; rows/s from wall time")
    print(f"{'format':8} {'what':30} {'wall s':>7} {'cpu s':>7} {'rows/s':>11} {'MB':>6}")
    for fmt in FORMATS:
        for what, path, action in _actions(folder, fmt, events, scores):
            wall, cpu = timed(action)
            size = path.stat().st_size / 1e6
            print(f"{fmt:8} {what:30} {wall:7.2f} {cpu:7.2f} {rows / wall:11,.0f} {size:6.1f}")


def _actions(
    folder: Path, fmt: str, events: EventTable, scores: ScoreTable
) -> list[tuple[str, Path, Callable[[], object]]]:
    events_path, scores_path = folder / f"events.{fmt}", folder / f"scores.{fmt}"
    return [
        ("write events", events_path, lambda: write_events(events_path, events)),
        (
            "read+validate+sort events",
            events_path,
            lambda: sort_events(read_events(events_path).table),
        ),
        ("write scores at once", scores_path, lambda: write_scores(scores_path, scores)),
        ("write scores in chunks", scores_path, lambda: chunked(scores_path, scores)),
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("rows", nargs="?", type=int, default=1_000_000)
    parser.add_argument("--keep", type=Path, help="write the files here and keep them")
    args = parser.parse_args()
    if args.keep:
        args.keep.mkdir(parents=True, exist_ok=True)
        bench(args.rows, args.keep)
        return
    with tempfile.TemporaryDirectory() as folder:
        bench(args.rows, Path(folder))


if __name__ == "__main__":
    main()
