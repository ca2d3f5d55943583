"""Write a large generated stream (events and labels) to files, and print how long it took.

    .venv/bin/python loadtest/gen_stream.py --events 1000000 --out /tmp/stream.parquet

The format follows each file's extension (see `service.files`). Only counts and timings are
printed, never an identifier.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from service.files import InputError, write_events, write_labels
from service.scenario import ScenarioError, ScenarioParams, generate


def _args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=1_000_000, help="approximate event count")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--out", type=Path, required=True, help="events file (.csv, .jsonl, ...)")
    parser.add_argument("--labels", type=Path, help="labels file; default: beside --out")
    return parser.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = _args(argv)
    labels_path = args.labels or args.out.with_name("labels" + "".join(args.out.suffixes))
    try:
        params = ScenarioParams(n_events=args.events, seed=args.seed)
    except ScenarioError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    t0 = time.perf_counter()
    scenario = generate(params)
    t1 = time.perf_counter()
    try:
        write_events(args.out, scenario.events)
        write_labels(labels_path, scenario.labels)
    except InputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    t2 = time.perf_counter()
    n = len(scenario.events)
    print(f"events            {n:>12,}")
    print(f"labels            {len(scenario.labels):>12,}")
    print(f"fraud share       {scenario.is_fraud.mean():>12.4f}")
    print(f"generate          {t1 - t0:>11.2f}s  ({n / (t1 - t0):,.0f} events/s)")
    print(f"write             {t2 - t1:>11.2f}s  ({n / (t2 - t1):,.0f} events/s)")
    print(f"events file       {args.out} ({args.out.stat().st_size / 1e6:,.1f} MB)")
    print(f"labels file       {labels_path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
