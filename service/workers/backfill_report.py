"""What a backfill did, and the summary it prints at the end.

The summary names counts, files and times only: never an identifier value (DESIGN.md tenet 7).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from service.workers.backfill_progress import STAGES


@dataclass
class BackfillReport:
    """Counts, files and times of one ``emberscore backfill`` run."""

    out: Path
    events_read: int = 0
    events_rejected: int = 0
    events_scored: int = 0
    decisions: dict[str, int] = field(default_factory=dict)
    labels_read: int = 0
    labels_rejected: int = 0
    labels_unknown_ids: int = 0  # label rows naming no event of the (validated) events file
    outcomes: dict[str, int] = field(default_factory=dict)
    labels_pending: int = 0
    versions_published: int = 0
    model_version: int = 0
    frozen_model: Path | None = None
    saved_model: Path | None = None
    event_rejects: Path | None = None
    label_rejects: Path | None = None
    checkpoint: Path | None = None
    chunks_total: int = 0
    chunks_reused: int = 0
    warmed_profiles: int | None = None
    stage_s: dict[str, float] = field(default_factory=dict)
    wall_s: float = 0.0

    @property
    def events_per_s(self) -> float:
        """Events scored per second of wall time, end to end: from reading the input to the
        scores file (and saved model) in place; a warm-up of Redis comes after."""
        return self.events_scored / self.wall_s if self.wall_s > 0 else 0.0


def _n(value: int) -> str:
    return f"{value:,}"


def _events_line(r: BackfillReport) -> str:
    decided = ", ".join(f"{d} {_n(r.decisions.get(d, 0))}" for d in ("allow", "review", "deny"))
    return (
        f"  events      {_n(r.events_read)} read, {_n(r.events_rejected)} rejected, "
        f"{_n(r.events_scored)} scored ({decided})"
    )


def _labels_line(r: BackfillReport) -> str:
    o = r.outcomes
    unknown = o.get("unknown_event", 0)
    return (
        f"  labels      {_n(r.labels_read)} read, {_n(r.labels_rejected)} rejected; "
        f"{_n(o.get('applied', 0))} applied, {_n(o.get('changed', 0))} changed, "
        f"{_n(o.get('duplicate', 0))} duplicate, {_n(r.labels_pending)} pending "
        "(known only after the last event)\n"
        f"              {_n(unknown)} unknown ({_n(r.labels_unknown_ids)} name no event of the "
        "events file; any others arrived after the label horizon or before their event)"
    )


def _model_line(r: BackfillReport) -> str:
    if r.frozen_model is not None:
        text = f"  model       frozen: version {r.model_version} from {r.frozen_model}, no learning"
    else:
        text = (
            f"  model       {_n(r.versions_published)} versions published during the replay; "
            f"final version {r.model_version}"
        )
    if r.saved_model is not None:
        text += f"; saved to {r.saved_model}"
    return text


def _stages_line(r: BackfillReport) -> str:
    names = [s for s in STAGES if s in r.stage_s] + [s for s in r.stage_s if s not in STAGES]
    return "  stages      " + ", ".join(f"{s} {r.stage_s[s]:.2f} s" for s in names)


def format_summary(r: BackfillReport) -> str:
    """The lines printed at the end of a run."""
    lines = [
        f"emberscore backfill: {_n(r.events_scored)} scores written to {r.out}",
        _events_line(r),
    ]
    if r.labels_read or r.labels_rejected:
        lines.append(_labels_line(r))
    lines.append(_model_line(r))
    lines.append(
        f"  speed       {_n(r.events_scored)} events in {r.wall_s:.2f} s: "
        f"{r.events_per_s:,.0f} events/s end to end"
    )
    lines.append(_stages_line(r))
    if r.checkpoint is not None:
        lines.append(
            f"  checkpoint  {r.checkpoint}: {r.chunks_reused} of {r.chunks_total} chunks "
            "reused from an earlier run; removed now that the run is complete"
        )
    rejects = [
        f"{what} rows in {path}" for what, path in (("event", r.event_rejects),
                                                    ("label", r.label_rejects)) if path
    ]  # fmt: skip
    if rejects:
        lines.append("  rejects     bad " + "; bad ".join(rejects))
    if r.warmed_profiles is not None:
        lines.append(
            f"  warm        {_n(r.warmed_profiles)} identifier profiles, model version "
            f"{r.model_version} and the observed-since time written to Redis"
        )
    return "\n".join(lines)
