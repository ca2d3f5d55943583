"""Labels as they reach the marketplace: late, partial, and shaped by what people looked at.

Fraudulent checkouts come back as chargebacks weeks later; fraudulent sign-ups and logins are
confirmed by manual review within days; only part of the fraud is ever confirmed. Reviewers also
clear benign events that the rules sent to review, and spot checks confirm a few benign checkouts.
Labels whose time falls after the end of the stream are kept: they count for evaluation, they
just cannot influence a replay. The shares and delays are configured in `ScenarioParams`.
"""

from __future__ import annotations

import numpy as np

from service.scenario_events import CHECKOUT
from service.scenario_params import ScenarioParams
from service.scenario_time import MS_PER_DAY
from service.tables import LabelTable


def _delay_ms(rng: np.random.Generator, n: int, days: tuple[float, float]) -> np.ndarray:
    return np.round(rng.uniform(days[0], days[1], n) * MS_PER_DAY).astype(np.int64)


def label_sources(
    rng: np.random.Generator,
    p: ScenarioParams,
    kind: np.ndarray,
    is_fraud: np.ndarray,
    decision: list[str | None],
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per source of labels: (which events it labels, delay in ms after each event)."""
    n = len(kind)
    u = rng.random(n)
    review = np.array([d == "review" for d in decision], dtype=bool)
    chosen = {
        "chargeback": is_fraud & (kind == CHECKOUT) & (u < p.chargeback_share),
        "confirmed": is_fraud & (kind != CHECKOUT) & (u < p.confirm_share),
        "cleared": ~is_fraud & review & (u < p.cleared_share),
    }
    audit = ~is_fraud & ~review & (kind == CHECKOUT) & (rng.random(n) < p.audit_share)
    chosen["audit"] = audit
    delays = {
        "chargeback": p.chargeback_delay_days,
        "confirmed": p.confirm_delay_days,
        "cleared": p.cleared_delay_days,
        "audit": p.audit_delay_days,
    }
    return {
        name: (np.flatnonzero(mask), _delay_ms(rng, int(mask.sum()), delays[name]))
        for name, mask in chosen.items()
    }


def make_labels(
    rng: np.random.Generator,
    p: ScenarioParams,
    event_id: list[str],
    ts_ms: np.ndarray,
    kind: np.ndarray,
    is_fraud: np.ndarray,
    decision: list[str | None],
) -> LabelTable:
    """One label at most per event, in the order the labels arrive."""
    sources = label_sources(rng, p, kind, is_fraud, decision)
    rows = np.concatenate([idx for idx, _ in sources.values()]).astype(np.int64)
    at_ms = ts_ms[rows] + np.concatenate([delay for _, delay in sources.values()])
    order = np.lexsort((rows, at_ms))
    rows, at_ms = rows[order], at_ms[order]
    return LabelTable(
        event_id=[event_id[i] for i in rows.tolist()],
        labeled_at_s=at_ms / 1000.0,
        is_fraud=is_fraud[rows].astype(bool),
    )
