"""The ``emberscore`` command: demo, serve, learn, backfill, evaluate, shadow.

Each subcommand parses its arguments here and hands them to the module that does the work, so this
file stays a table of contents. User errors (bad files, bad settings) end with a one-line message
and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

EXIT_USAGE = 2


class CommandError(Exception):
    """A problem the user can fix; printed without a traceback."""


def _rates(text: str) -> tuple[float, ...]:
    try:
        rates = tuple(float(part) for part in text.split(",") if part.strip())
    except ValueError as exc:
        raise argparse.ArgumentTypeError(
            f"not a comma-separated list of numbers: {text!r}"
        ) from exc
    if not rates or any(not 0.0 < r < 1.0 for r in rates):
        raise argparse.ArgumentTypeError("alert rates must be between 0 and 1, e.g. 0.005,0.01")
    return rates


def _add_demo(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("demo", help="invent a scenario, replay it, and compare with the rules")
    p.add_argument("--out", default="demo-out", help="folder for the files (default: demo-out)")
    p.add_argument("--seed", type=int, default=7, help="scenario seed (default: 7)")
    p.add_argument("--events", type=int, default=120_000, help="approximate number of events")
    p.add_argument("--days", type=int, default=42, help="length of the scenario in days")
    p.set_defaults(run=_run_demo)


def _add_serve(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("serve", help="run the HTTP scoring service (settings: EMBERSCORE_*)")
    p.add_argument("--host", default=None, help="address to bind (default from settings)")
    p.add_argument("--port", type=int, default=None, help="port (default from settings)")
    p.add_argument("--workers", type=int, default=None, help="worker processes (Redis only)")
    p.set_defaults(run=_run_serve)


def _add_learn(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("learn", help="run the label learner against Redis (settings: EMBERSCORE_*)")
    p.add_argument("--once", action="store_true", help="apply what is queued, then exit")
    p.set_defaults(run=_run_learn)


def _add_backfill(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("backfill", help="replay history point-in-time and write scores")
    p.add_argument("events", help="events file (.csv, .jsonl, .parquet)")
    p.add_argument("--labels", help="labels file, applied when each label arrived")
    p.add_argument("--out", required=True, help="scores file to write (format by extension)")
    p.add_argument("--rejects", help="write bad rows here (line, field, reason) and go on")
    p.add_argument("--strict", action="store_true", help="stop at the first bad row")
    p.add_argument("--checkpoint", help="checkpoint folder: a killed run resumes from it")
    p.add_argument("--checkpoint-every", type=int, default=200_000, help="events per checkpoint")
    p.add_argument("--warm", metavar="REDIS_URL", help="write the final state into this Redis")
    p.add_argument("--save-model", help="save the learned model snapshot to this file")
    p.add_argument("--model", help="score with this saved model, frozen (no learning)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(run=_run_backfill)


def _add_evaluate(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("evaluate", help="ranking metrics of a scores file against labels")
    p.add_argument("scores", help="scores file written by backfill")
    p.add_argument("--labels", required=True, help="labels file")
    p.add_argument("--alert-rates", type=_rates, default=(0.005, 0.01, 0.02))
    p.add_argument("--top-k", type=int, default=100, help="daily review queue size")
    p.add_argument("--as-of", help="count only labels known by this date or time")
    p.add_argument("--segments", help="CSV event_id,segment for catch rates per segment")
    p.add_argument("--labels-rejects", help="write bad label rows here and go on")
    p.set_defaults(run=_run_evaluate)


def _add_shadow(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("shadow", help="compare emberscore's decisions with the rules in force")
    p.add_argument("scores", nargs="?", help="scores file with current_decision")
    p.add_argument(
        "--from", dest="from_redis", metavar="REDIS_URL", help="read the live shadow log"
    )
    p.add_argument("--labels", help="labels file")
    p.add_argument("--html", required=True, help="report to write")
    p.add_argument("--review-capacity", type=float, help="reviews a day the team can do")
    p.add_argument("--title", default="emberscore shadow report")
    p.add_argument("--labels-rejects", help="write bad label rows here and go on")
    p.set_defaults(run=_run_shadow)


def _run_demo(args: argparse.Namespace) -> int:
    from service.demo import run_demo

    return run_demo(out=args.out, seed=args.seed, n_events=args.events, days=args.days)


def _run_serve(args: argparse.Namespace) -> int:
    from service.workers.serve import serve

    return int(serve(host=args.host, port=args.port, workers=args.workers))


def _run_learn(args: argparse.Namespace) -> int:
    from service.workers.learn_loop import run_learner

    return int(run_learner(once=args.once))


def _run_backfill(args: argparse.Namespace) -> int:
    from service.workers.backfill import run_backfill

    return int(run_backfill(args))


def _run_evaluate(args: argparse.Namespace) -> int:
    from service.workers.evaluation import evaluate_files, format_table

    result = evaluate_files(
        args.scores,
        args.labels,
        alert_rates=args.alert_rates,
        top_k=args.top_k,
        as_of=args.as_of,
        segments_path=args.segments,
        labels_reject_path=args.labels_rejects,
    )
    print(format_table(result))
    return 0


def _run_shadow(args: argparse.Namespace) -> int:
    from service.workers.shadow_command import run_shadow

    return int(run_shadow(args))


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="emberscore",
        description="Streaming reputation scoring for sign-up and checkout abuse.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for add in (_add_demo, _add_serve, _add_learn, _add_backfill, _add_evaluate, _add_shadow):
        add(sub)
    return parser


def _user_errors() -> tuple[type[BaseException], ...]:
    """Exception types that mean "the user can fix this": printed as one line."""
    from scoring.config import ConfigError
    from scoring.fusion import SnapshotError
    from service.config import SettingsError
    from service.files_base import InputError

    errors: list[type[BaseException]] = [
        CommandError,
        ConfigError,
        SnapshotError,
        SettingsError,
        InputError,
        FileNotFoundError,
        IsADirectoryError,
        PermissionError,
    ]
    try:
        from service.workers.evaluation import EvaluationError

        errors.append(EvaluationError)
    except ImportError:  # pragma: no cover - module optional while building
        pass
    return tuple(errors)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``emberscore`` console script."""
    args = build_parser().parse_args(argv)
    run: Callable[[argparse.Namespace], int] = args.run
    try:
        return run(args)
    except _user_errors() as exc:
        print(f"emberscore {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"emberscore {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
