"""Benchmark ``emberscore backfill`` end to end and print the figures (nothing asserts).

    .venv/bin/python -m loadtest.bench_backfill                         # 1,000,000 events, 91 days
    .venv/bin/python -m loadtest.bench_backfill --events 200000 --days 30   # a quick look

Generates the demo world's stream with its labels (`service.scenario.generate` with
``ScenarioParams(n_events, days, seed)``: invented data; the world's dated episodes need
``--days`` of 26 or more), writes it as CSV and as Parquet, and keeps the files in a cache
folder under the temporary directory (``--cache`` to choose another), so later runs skip the
generation. Then, per format, it runs the backfill as the command does (read and check the
files, sort, plan, features, learning, scoring, write the scores file in the same format) in
this process, and prints the events per second end to end (from reading the first byte to the
renamed scores file), the time it would take for one million events at that speed, and the time
of each stage.

By default the process is pinned to one CPU (``os.sched_setaffinity``, Linux), so the figures are
those of one core even where numpy or Arrow would start threads; ``--all-cores`` lifts that.
Process start-up and imports are not counted. Settings come from the environment as for the
command (the development hashing secret unless ``EMBERSCORE_HASH_SECRET`` is set).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

if __package__ in (None, ""):  # run as a script (python loadtest/bench_backfill.py)
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from service.files import write_events, write_labels
from service.scenario import ScenarioError, ScenarioParams, generate
from service.workers.backfill import BackfillRun
from service.workers.backfill_inputs import BackfillOptions, load_settings
from service.workers.backfill_progress import STAGES, Progress
from service.workers.backfill_report import BackfillReport

FORMATS = ("csv", "parquet")


def stream_files(folder: Path, n_events: int, days: int, seed: int) -> tuple[int, int]:
    """Events and labels in every format in ``folder`` (generated once); their row counts."""
    counts = folder / "counts.txt"
    wanted = [folder / f"{kind}.{fmt}" for kind in ("events", "labels") for fmt in FORMATS]
    if counts.exists() and all(p.exists() for p in wanted):
        events, labels = (int(v) for v in counts.read_text().split())
        print(f"stream: reusing {folder}")
        return events, labels
    folder.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    world = generate(ScenarioParams(n_events=n_events, days=days, seed=seed))
    print(f"stream: generated in {time.perf_counter() - started:.1f} s, writing {folder}")
    for fmt in FORMATS:
        write_events(folder / f"events.{fmt}", world.events)
        write_labels(folder / f"labels.{fmt}", world.labels)
    counts.write_text(f"{len(world.events)} {len(world.labels)}\n")
    return len(world.events), len(world.labels)


def run_once(folder: Path, fmt: str, out_dir: Path) -> BackfillReport:
    options = BackfillOptions(
        events=folder / f"events.{fmt}",
        labels=folder / f"labels.{fmt}",
        out=out_dir / f"scores.{fmt}",
        chunk_rows=200_000,
        show_progress=False,
    )
    return BackfillRun(options, load_settings(), Progress(None)).run()


def pin_to_one_core() -> str:
    if not hasattr(os, "sched_setaffinity"):
        return "not pinned (no sched_setaffinity on this system)"
    cpu = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {cpu})
    return f"pinned to CPU {cpu}"


def print_table(rows: list[tuple[str, BackfillReport]]) -> None:
    stages = "".join(f"{s:>10}" for s in STAGES)
    print(f"{'format':<8}{'events':>11}{'events/s':>11}{'per 1M':>10}{'wall':>9}{stages}")
    for fmt, r in rows:
        per_million = 1_000_000 / r.events_per_s if r.events_per_s else float("nan")
        times = "".join(f"{r.stage_s.get(s, 0.0):>9.2f}s" for s in STAGES)
        print(
            f"{fmt:<8}{r.events_scored:>11,}{r.events_per_s:>11,.0f}{per_million:>9.1f}s"
            f"{r.wall_s:>8.1f}s{times}"
        )


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--events", type=int, default=1_000_000, help="approximate stream size")
    parser.add_argument("--days", type=int, default=91, help="length of the stream in days")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--cache", type=Path, help="folder for the generated stream")
    parser.add_argument("--formats", default=",".join(FORMATS), help="csv,parquet")
    parser.add_argument("--repeat", type=int, default=1, help="runs per format (best is shown)")
    parser.add_argument("--all-cores", action="store_true", help="do not pin to one CPU")
    args = parser.parse_args(argv)
    cache = args.cache or Path(tempfile.gettempdir()) / "emberscore-bench-backfill"
    folder = cache / f"n{args.events}-d{args.days}-s{args.seed}"
    try:
        n_events, n_labels = stream_files(folder, args.events, args.days, args.seed)
    except ScenarioError as exc:
        print(f"bench_backfill: {exc}", file=sys.stderr)
        return 2
    print(f"stream: {n_events:,} events, {n_labels:,} labels over {args.days} days")
    cpu = "all cores" if args.all_cores else pin_to_one_core()
    print(f"cpu: {cpu}; python {sys.version.split()[0]}")
    rows = []
    with tempfile.TemporaryDirectory(prefix="emberscore-bench-") as out_dir:
        for fmt in [f.strip() for f in args.formats.split(",") if f.strip()]:
            runs = [run_once(folder, fmt, Path(out_dir)) for _ in range(max(1, args.repeat))]
            rows.append((fmt, max(runs, key=lambda r: r.events_per_s)))
    print_table(rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
