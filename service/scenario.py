"""The demo world: an invented marketplace, its customers, its attackers and its rules in force.

Quillfern Market (invented) is an online marketplace for pre-owned outdoor and cycling gear,
selling in the UK, Ireland, Australia, New Zealand, the US and Canada. `generate` writes six
weeks of its sign-ups, logins and checkouts, the decisions of the static rules it runs before it
has a model, and the late, partial labels that chargebacks and reviews bring.

Everything is invented: names, domains (under the reserved .example and .test), phone numbers
(drama ranges where `phonenumbers` accepts them, else the valid national plan), addresses (public
looking, none special-purpose) and device ids (random hex). Attacks differ from benign traffic
only in how identifiers link and in timing, never in spelling; benign traffic holds hard cases
(see `service.scenario_visits`). The same parameters give the same output, bit for bit.

>>> s = generate(ScenarioParams(n_events=5_000, seed=3))
>>> len(s.events) == len(s.segment) == len(s.is_fraud)
True
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.scenario_attacks import INCIDENT_NETWORKS, attack_events
from service.scenario_benign import build_population
from service.scenario_events import (
    CHECKOUT,
    EVENT_TYPES,
    SEGMENTS,
    EventBatch,
    expand,
    lognormal_amounts,
)
from service.scenario_labels import make_labels
from service.scenario_net import format_addresses
from service.scenario_params import ScenarioError, ScenarioParams
from service.scenario_phone import display
from service.scenario_rules import RuleSet, rule_hits, rules_in_force
from service.scenario_time import Clock
from service.scenario_visits import benign_sessions
from service.scenario_world import World
from service.tables import EventTable, LabelTable

__all__ = [
    "RuleSet",
    "Scenario",
    "ScenarioError",
    "ScenarioParams",
    "generate",
    "rule_hits",
    "rules_in_force",
]


@dataclass
class Scenario:
    """A generated stream with its ground truth."""

    events: EventTable  # sorted by ts (stable), current_decision filled
    labels: LabelTable
    is_fraud: np.ndarray  # bool per event
    segment: list[str]  # per event: "benign", "benign:<burst>" or "attack:<shape>"
    rules: RuleSet  # the rules in force, with this world's hand-kept lists
    params: ScenarioParams


def generate(params: ScenarioParams | None = None) -> Scenario:
    """Generate the scenario for `params` (the demo defaults when None)."""
    p = params or ScenarioParams()
    p.validate()
    rng = np.random.default_rng(p.seed)
    clock = Clock(round(p.start_s * 1000), p.days)
    world = World(rng, clock, p.scale, p.plus_tag_share, p.capital_email_share, p.landline_share)
    pop, hh = build_population(world, p)
    benign = benign_sessions(world, p, pop, hh)
    batches = [expand(rng, benign, lognormal_amounts(p.amount_median, p.amount_sigma))]
    batches += attack_events(world, p, pop, benign)
    ev = EventBatch.concat(batches)
    inside = np.flatnonzero((ev.ts_ms >= clock.start_ms) & (ev.ts_ms < clock.end_ms))
    order = inside[np.argsort(ev.ts_ms[inside], kind="stable")]
    events = _event_table(world, p, ev, order)
    nets = world.nets.hosting[list(INCIDENT_NETWORKS)]
    rules = p.rules.with_incidents(world.incident_domains, [_cidr24(int(b)) for b in nets])
    events.current_decision = list(rules_in_force(events, rules))
    segment_code = ev.segment[order]
    is_fraud = segment_code >= SEGMENTS.index("attack:device_farm")
    labels = make_labels(
        rng, p, events.event_id, ev.ts_ms[order], ev.kind[order], is_fraud, events.current_decision
    )
    segment = [SEGMENTS[c] for c in segment_code.tolist()]
    return Scenario(events, labels, is_fraud, segment, rules, p)


def _cidr24(base: int) -> str:
    return f"{base >> 24}.{(base >> 16) & 255}.{(base >> 8) & 255}.0/24"


def _hex_ids(world: World, n: int, prefix: str, hex_digits: int, tag: int) -> list[str]:
    """`n` distinct random-looking ids (hex), stable for the world's seed."""
    shift = np.uint64(64 - 4 * hex_digits)
    for attempt in range(8):
        h = world.hash(np.full(n, tag * 16 + attempt), np.arange(n)) >> shift
        if len(np.unique(h)) == n:
            return [f"{prefix}{x:0{hex_digits}x}" for x in h.tolist()]
    raise RuntimeError("could not draw distinct ids; lower n_events")  # pragma: no cover


def _device_ids(world: World, used: np.ndarray) -> dict[int, str]:
    """32 hex digits per device in use (a 128-bit random-looking id)."""
    hi = world.hash(np.full(len(used), 3), used)
    lo = world.hash(np.full(len(used), 4), used)
    return {
        d: f"{a:016x}{b:016x}"
        for d, a, b in zip(used.tolist(), hi.tolist(), lo.tolist(), strict=True)
    }


def _event_table(world: World, p: ScenarioParams, ev: EventBatch, order: np.ndarray) -> EventTable:
    kind = ev.kind[order]
    account = ev.account[order]
    accounts = np.array(_hex_ids(world, len(world.emails), "acc_", 12, 1), dtype=object)
    phones = np.array(
        [*display(world.rng, world.phone_of, p.spaced_phone_share), None], dtype=object
    )
    emails = np.array([*world.emails, None], dtype=object)
    carries = kind != 1  # sign-ups and checkouts carry e-mail and phone; logins do not
    contact = np.where(carries, account, len(world.emails))
    device = ev.device[order]
    used = np.unique(device[device >= 0])
    dev_text = _device_ids(world, used)
    amount = np.where(kind == CHECKOUT, ev.amount[order], np.nan)
    return EventTable(
        event_id=_hex_ids(world, len(order), "evt_", 16, 2),
        ts_s=ev.ts_ms[order] / 1000.0,
        type=[EVENT_TYPES[k] for k in kind.tolist()],
        account_id=list(accounts[account]),
        ip=format_addresses(ev.ip_ver[order], ev.ip_hi[order], ev.ip_lo[order]),
        device_id=[dev_text[d] if d >= 0 else None for d in device.tolist()],
        phone=list(phones[contact]),
        email=list(emails[contact]),
        amount=amount,
        current_decision=[None] * len(order),
    )
