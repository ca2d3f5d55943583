"""`emberscore demo`: an invented marketplace's six weeks, replayed, against the rules in force.

It invents the scenario (`service.scenario`), writes the events, labels and segments files,
replays the events point-in-time through the engine's batch path with labels applied as they
arrived, writes the scores file, and prints the same table `emberscore evaluate` prints for those
files. Nothing needs a server, and everything it prints can be reproduced from the files.
"""

from __future__ import annotations

import csv
import sys
import time
from pathlib import Path

import numpy as np

from scoring.batch import replay_columns
from scoring.batch_plan import ColumnPlanner
from scoring.fusion import Fusion, OnlineModel, model_features
from scoring.hashing import KeyHasher
from service.config import Settings
from service.files import write_events, write_labels, write_scores
from service.scenario import ScenarioParams, generate
from service.tables import EventTable, LabelTable, ScoreTable
from service.workers.backfill_inputs import label_columns, plan_events
from service.workers.evaluation import evaluate_files, format_table

CAUTION = (
    "Automated denials affect real people: keep a human review path, check outcomes across "
    "groups of customers for disparate impact, and follow local law on automated decisions "
    "and data protection."
)


def _say(text: str = "") -> None:
    print(text, flush=True)


def _scenario_params(seed: int, n_events: int, days: int) -> ScenarioParams:
    if days == ScenarioParams.days:
        return ScenarioParams(seed=seed, n_events=n_events)
    # keep the scenario's dated episodes inside a shorter or longer window
    scale = days / ScenarioParams.days
    return ScenarioParams(
        seed=seed,
        n_events=n_events,
        days=days,
        promo_day=max(1, min(days - 2, round(ScenarioParams.promo_day * scale))),
        campus_wave_day=max(1, min(days - 2, round(ScenarioParams.campus_wave_day * scale))),
        slow_start_day=max(1, min(days - 7, round(ScenarioParams.slow_start_day * scale))),
        slow_days=max(1, min(days - 8, round(ScenarioParams.slow_days * scale))),
    )


def replay_tables(
    events: EventTable, labels: LabelTable, settings: Settings
) -> tuple[ScoreTable, dict[str, int], float]:
    """Point-in-time replay of sorted events with labels; returns scores, label counts, seconds."""
    config = settings.scoring_config()
    started = time.perf_counter()
    planner = ColumnPlanner(config, KeyHasher(settings.secret_bytes()), settings.default_region)
    columns = plan_events(planner, events)
    label_cols, _ = label_columns(events, labels)
    fusion = Fusion(config)
    model = OnlineModel(model_features(fusion.layout), config.learning_rate, config.l2)
    result = replay_columns(
        columns, label_cols, fusion, model, record_ttl_s=settings.label_horizon_s
    )
    seconds = time.perf_counter() - started
    scores = ScoreTable(
        list(events.event_id),
        events.ts_s.copy(),
        result.risk,
        result.decision,
        result.reasons,
        list(events.current_decision) if events.has_current_decision() else None,
        None if np.all(np.isnan(events.amount)) else events.amount.copy(),
    )
    outcomes = dict(result.outcomes)
    outcomes["pending"] = result.labels_pending
    return scores, outcomes, seconds


def _write_segments(path: Path, event_ids: list[str], segments: list[str]) -> None:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["event_id", "segment"])
        writer.writerows(zip(event_ids, segments, strict=True))


def run_demo(out: str, seed: int, n_events: int, days: int) -> int:
    """Invent, replay, write and compare; returns the exit status."""
    folder = Path(out)
    folder.mkdir(parents=True, exist_ok=True)
    settings = Settings()
    _say(f"emberscore demo: inventing {n_events:,} events over {days} days (seed {seed}) ...")
    started = time.perf_counter()
    scenario = generate(_scenario_params(seed, n_events, days))
    events, labels = scenario.events, scenario.labels
    _say(
        f"  {len(events):,} events, {int(scenario.is_fraud.sum()):,} of them fraud, "
        f"{len(labels):,} labels arriving late ({time.perf_counter() - started:.1f} s)"
    )
    paths = {name: folder / f"{name}.csv" for name in ("events", "labels", "segments", "scores")}
    write_events(paths["events"], events)
    write_labels(paths["labels"], labels)
    _write_segments(paths["segments"], events.event_id, scenario.segment)
    _say("replaying point-in-time (each event sees only what was known before it) ...")
    scores, outcomes, seconds = replay_tables(events, labels, settings)
    _say(
        f"  scored {len(events):,} events in {seconds:.1f} s: "
        f"{len(events) / seconds:,.0f} events/s; labels applied during the replay: "
        f"{outcomes.get('applied', 0) + outcomes.get('changed', 0):,}, "
        f"arriving after its end: {outcomes.get('pending', 0):,}"
    )
    write_scores(paths["scores"], scores)
    result = evaluate_files(
        paths["scores"], paths["labels"], alert_rates=(0.01,), segments_path=paths["segments"]
    )
    _say()
    _say(format_table(result))
    _say()
    _say(f"files in {folder}/: " + ", ".join(p.name for p in paths.values()))
    _say(
        "reproduce the table: emberscore backfill "
        f"{paths['events']} --labels {paths['labels']} --out scores.csv && "
        f"emberscore evaluate scores.csv --labels {paths['labels']} "
        f"--alert-rates 0.01 --segments {paths['segments']}"
    )
    _say(f"caution: {CAUTION}")
    sys.stdout.flush()
    return 0
