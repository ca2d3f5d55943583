"""`emberscore shadow`: the shadow-mode report from a scores file or from the live shadow log.

The live service appends event id, time, risk, decision and the rules' decision to a capped log
in Redis for every scored event that carried ``current_decision``; ``--from REDIS_URL`` reads that
log instead of a file, and the same report is built from it.
"""

from __future__ import annotations

import argparse
import asyncio

from service import files
from service.config import Settings
from service.tables import LabelTable, ScoreTable
from service.workers.evaluation import EvaluationError
from service.workers.shadow import build_shadow_report, terminal_summary, write_report


async def _read_live_log(redis_url: str) -> ScoreTable:
    from service.stores.redis import RedisStore

    settings = Settings(redis_url=redis_url)
    store = await RedisStore.connect(settings, settings.scoring_config())
    try:
        return await store.read_shadow()
    finally:
        await store.close()


def _scores(args: argparse.Namespace) -> ScoreTable:
    if args.from_redis and args.scores:
        raise EvaluationError("give either a scores file or --from REDIS_URL, not both")
    if args.from_redis:
        table = asyncio.run(_read_live_log(args.from_redis))
        if len(table) == 0:
            raise EvaluationError(
                "the live shadow log is empty: the service appends to it only for score "
                "requests that carry current_decision"
            )
        return table
    if not args.scores:
        raise EvaluationError("give a scores file (from backfill) or --from REDIS_URL")
    return files.read_scores(args.scores)


def run_shadow(args: argparse.Namespace) -> int:
    """Build the report, write the HTML page, print a short summary; returns the exit status."""
    scores = _scores(args)
    labels: LabelTable | None = None
    if args.labels:
        labels = files.read_labels(args.labels, reject_path=args.labels_rejects).table
    report = build_shadow_report(
        scores, labels, review_capacity_per_day=args.review_capacity, title=args.title
    )
    path = write_report(args.html, report)
    print(terminal_summary(report))
    print(f"report written to {path}")
    return 0
