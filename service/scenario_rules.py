"""The rules in force: the static rule set the demo marketplace runs before it has a model.

A plausible first rule set of the kind teams write by hand (common practice, no source): velocity
limits with exact sliding windows, an amount limit for brand-new accounts, a hard amount limit,
and deny lists. Each event gets the most severe decision of the rules it trips (deny over review
over allow). Windows are exact: an event at time t counts the events of its key with a time in
(t - window, t], itself included, that came before it in the stream.
"""

from __future__ import annotations

import ipaddress
import socket
from collections import Counter, deque
from dataclasses import dataclass, replace

import numpy as np
from disposable_email_domains import blocklist as packaged_disposable

from service.tables import EventTable

# Rule name -> the decision it gives.
RULE_DECISIONS = {
    "signup_ip_velocity": "deny",
    "blocked_domain": "deny",
    "blocked_network": "deny",
    "device_accounts": "review",
    "young_account_amount": "review",
    "high_amount": "review",
}


class RuleInputError(ValueError):
    """The events cannot be run through the rules as given; the message says what to fix."""


@dataclass(frozen=True)
class RuleSet:
    """Thresholds and hand-kept lists of the rules in force."""

    signup_ip_max_per_hour: int = 5  # deny a sign-up when its IP made more in the last hour
    device_accounts_max_per_day: int = 3  # review when a device served more accounts in a day
    young_account_age_s: float = 86_400.0
    young_account_amount: float = 250.0  # review checkouts above this on younger accounts
    high_amount: float = 2_000.0  # review every checkout above this
    blocked_domains: frozenset[str] = frozenset()  # hand-kept, on top of the packaged list
    blocked_networks: tuple[str, ...] = ()  # CIDR blocks from past incidents
    use_packaged_disposable: bool = True

    def with_incidents(self, domains: list[str], networks: list[str]) -> RuleSet:
        """This rule set with more hand-kept domains and networks."""
        return replace(
            self,
            blocked_domains=self.blocked_domains | {d.lower() for d in domains},
            blocked_networks=(*self.blocked_networks, *networks),
        )


def rules_in_force(events: EventTable, rules: RuleSet | None = None) -> list[str]:
    """The rules' decision (allow, review or deny) for every event, in one pass over the stream.

    The events must be in stream order (time order); ties keep their given order.
    """
    hits = rule_hits(events, rules)
    deny = np.zeros(len(events), dtype=bool)
    review = np.zeros(len(events), dtype=bool)
    for name, hit in hits.items():
        if RULE_DECISIONS[name] == "deny":
            deny |= hit
        else:
            review |= hit
    decisions: list[str] = np.where(deny, "deny", np.where(review, "review", "allow")).tolist()
    return decisions


def rule_hits(events: EventTable, rules: RuleSet | None = None) -> dict[str, np.ndarray]:
    """Per rule, a boolean array: did the rule fire on each event."""
    rules = rules or RuleSet()
    ts_ms = np.round(np.asarray(events.ts_s, dtype=float) * 1000.0).astype(np.int64)
    if len(ts_ms) and np.any(np.diff(ts_ms) < 0):
        raise RuleInputError("the rules need events in time order: sort them by ts first")
    kinds = np.array(events.type, dtype=object)
    checkout = kinds == "checkout"
    amount = np.nan_to_num(np.asarray(events.amount, dtype=float), nan=0.0)
    return {
        "signup_ip_velocity": _signup_ip_velocity(events, ts_ms, kinds, rules),
        "blocked_domain": _blocked_domain(events, rules),
        "blocked_network": _blocked_network(events, rules),
        "device_accounts": _device_accounts(events, ts_ms, rules),
        "young_account_amount": checkout
        & (amount > rules.young_account_amount)
        & _young_account(events, ts_ms, kinds, rules),
        "high_amount": checkout & (amount > rules.high_amount),
    }


def _signup_ip_velocity(
    events: EventTable, ts_ms: np.ndarray, kinds: np.ndarray, rules: RuleSet
) -> np.ndarray:
    hit = np.zeros(len(events), dtype=bool)
    window: dict[str, deque[int]] = {}
    for i in np.flatnonzero(kinds == "signup").tolist():
        ip = events.ip[i]
        if not ip:
            continue
        q = window.setdefault(ip, deque())
        t = int(ts_ms[i])
        while q and q[0] <= t - 3_600_000:
            q.popleft()
        q.append(t)
        hit[i] = len(q) > rules.signup_ip_max_per_hour
    return hit


def _busy_devices(events: EventTable, most: int) -> set[str]:
    """Devices seen with more than `most` accounts over the whole stream: only they can fire."""
    pairs = {(d, a) for d, a in zip(events.device_id, events.account_id, strict=True) if d and a}
    per_device = Counter(d for d, _ in pairs)
    return {d for d, k in per_device.items() if k > most}


def _device_accounts(events: EventTable, ts_ms: np.ndarray, rules: RuleSet) -> np.ndarray:
    hit = np.zeros(len(events), dtype=bool)
    busy = _busy_devices(events, rules.device_accounts_max_per_day)
    seen: dict[str, tuple[deque[tuple[int, str]], Counter[str]]] = {}
    for i, (device, account) in enumerate(zip(events.device_id, events.account_id, strict=True)):
        if device not in busy or not account:
            continue
        q, counts = seen.setdefault(device, (deque(), Counter()))
        t = int(ts_ms[i])
        while q and q[0][0] <= t - 86_400_000:
            _, old = q.popleft()
            counts[old] -= 1
            if not counts[old]:
                del counts[old]
        q.append((t, account))
        counts[account] += 1
        hit[i] = len(counts) > rules.device_accounts_max_per_day
    return hit


def _young_account(
    events: EventTable, ts_ms: np.ndarray, kinds: np.ndarray, rules: RuleSet
) -> np.ndarray:
    """Accounts whose sign-up, seen earlier in the stream, is recent. Accounts with no sign-up
    in the stream were created before it and count as old."""
    signed_up: dict[str, int] = {}
    young = np.zeros(len(events), dtype=bool)
    age_ms = rules.young_account_age_s * 1000.0
    for i, (kind, account) in enumerate(zip(kinds.tolist(), events.account_id, strict=True)):
        if account is None:
            continue
        if kind == "signup":
            signed_up.setdefault(account, int(ts_ms[i]))
        elif account in signed_up:
            young[i] = ts_ms[i] - signed_up[account] < age_ms
    return young


def _blocked_domain(events: EventTable, rules: RuleSet) -> np.ndarray:
    blocked = set(rules.blocked_domains)
    out = np.zeros(len(events), dtype=bool)
    for i, email in enumerate(events.email):
        if email and "@" in email:
            domain = email.rsplit("@", 1)[1].strip().lower()
            out[i] = domain in blocked or (
                rules.use_packaged_disposable and domain in packaged_disposable
            )
    return out


def _address_int(text: str) -> tuple[int, int] | None:
    """(version, integer value) of an address in text, None when it is not one."""
    text = text.strip()
    for family, version in ((socket.AF_INET, 4), (socket.AF_INET6, 6)):
        try:
            return version, int.from_bytes(socket.inet_pton(family, text), "big")
        except (OSError, ValueError):
            continue
    return None


def _blocked_network(events: EventTable, rules: RuleSet) -> np.ndarray:
    nets = [ipaddress.ip_network(n, strict=False) for n in rules.blocked_networks]
    spans = [(n.version, int(n.network_address), int(n.broadcast_address)) for n in nets]
    out = np.zeros(len(events), dtype=bool)
    if not spans:
        return out
    verdict: dict[str, bool] = {}
    for i, ip in enumerate(events.ip):
        if not ip:
            continue
        if ip not in verdict:
            addr = _address_int(ip)  # garbage addresses are not this rule's business
            verdict[ip] = addr is not None and any(
                v == addr[0] and lo <= addr[1] <= hi for v, lo, hi in spans
            )
        out[i] = verdict[ip]
    return out
