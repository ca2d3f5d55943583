"""The transparent prior: weight-of-evidence points that give a usable score before any label.

Each signal adds log-odds points to the base rate's log-odds when its evidence is present, and
names its reason in plain words. The point values are judgement, not estimates (common practice in
the trade, no source): they stand in for weights of evidence until labels exist, after which the
online model (`fusion`) learns how much each piece of evidence, the prior's total included, is
really worth. They are deliberately moderate: a prior that shouts on newness alone would bury
a promotion day's honest new customers.

Every signal is a function of the feature vector alone, so the learner can recompute the prior of
a logged event from its logged features. Signals are written once against a small set of
operations (`Ops`) that exist both for single numbers (one event) and for numpy columns (a batch
of events), so the one definition serves both paths.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from scoring.config import ScoringConfig
from scoring.features import FeatureLayout, horizon_label

Number = Any  # a float for one event, a numpy column for a batch


@dataclass(frozen=True, slots=True)
class Evidence:
    """One piece of evidence: log-odds points, the reason code and the number it quotes."""

    points: float
    code: str
    value: float


@dataclass(frozen=True)
class Ops:
    """The operations signals may use: one set for numbers, one for numpy arrays."""

    expm1: Callable[[Number], Number]
    log2: Callable[[Number], Number]
    exp: Callable[[Number], Number]
    maximum: Callable[[Number, Number], Number]
    minimum: Callable[[Number, Number], Number]
    where: Callable[[Number, Number, Number], Number]


SCALAR = Ops(math.expm1, math.log2, math.exp, max, min, lambda c, a, b: a if c else b)
VECTOR = Ops(np.expm1, np.log2, np.exp, np.maximum, np.minimum, np.where)

Signal = Callable[[Callable[[str], Number], Ops], list[tuple[str, Number, Number]]]
"""A signal reads features by name and returns (code, points, quoted value) triples."""


def shared_device(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
    """A device used by several accounts: 0 points at 2 accounts a day, +1.5 per doubling."""
    day = ops.maximum(ops.expm1(f("device.accounts_1d")), 1.0)
    month = ops.maximum(ops.expm1(f("device.accounts_30d")), 1.0)
    points = ops.maximum(1.5 * (ops.log2(day) - 1.0), ops.log2(month) - 2.0)
    return [("device.accounts", ops.minimum(points, 5.0), ops.maximum(day, month))]


def young_hub(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
    """A young network, domain, number block or address that already gathers many accounts."""
    out = []
    for kind in ("email_domain", "ip_net", "phone_prefix", "ip"):
        accounts = ops.maximum(ops.expm1(f(f"{kind}.accounts_1d")), 1.0)
        youth = 1.0 / (1.0 + ops.expm1(f(f"{kind}.age_d")) / 2.0)
        points = ops.where(accounts >= 3.0, youth * 1.5 * (ops.log2(accounts) - 1.0), 0.0)
        out.append((f"{kind}.young_hub", ops.minimum(points, 5.0), accounts))
    return out


def label_history(
    kinds: Sequence[str],
) -> Signal:
    """Identifiers with confirmed fraud among their recent events (Beta-smoothed share)."""

    def signal(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
        out = []
        for kind in kinds:
            excess = f(f"{kind}.bad")
            points = ops.where(excess > 0.3, ops.minimum(0.8 * excess, 4.0), 0.0)
            out.append((f"{kind}.bad", points, excess))
        return out

    return signal


def takeover(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
    """An established account seen from a device and a network it has never used."""
    age_d = ops.expm1(f("account.age_d"))
    established = age_d >= 3.0
    new_device = f("account.device_unseen") > 0.0
    new_net = f("account.ip_net_unseen") > 0.0
    both = established & new_device & new_net
    vs_usual = f("amount.vs_usual")
    spend = established & (new_device | new_net) & (vs_usual > 1.0)
    return [
        ("account.new_device_and_network", ops.where(both, 1.5, 0.0), age_d),
        (
            "amount.vs_usual",
            ops.where(spend, ops.minimum(0.8 * vs_usual, 2.0), 0.0),
            ops.exp(vs_usual),
        ),
    ]


def account_velocity(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
    """Many events from one account within the hour."""
    hourly = ops.expm1(f("account.n_1h"))
    return [("account.velocity", ops.minimum(0.4 * ops.maximum(hourly - 3.0, 0.0), 2.0), hourly)]


FLAG_POINTS = {
    "email_disposable": ("email.disposable", 2.0),
    "phone_invalid": ("phone.invalid", 1.0),
    "phone_voip": ("phone.voip", 0.8),
    "ip_special": ("ip.special", 0.5),
    "phone_no_country": ("phone.no_country", 0.3),
    "email_subaddress": ("email.subaddress", 0.2),
}


def flags(f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
    """Flags raised by normalisation (disposable domain, invalid or VoIP phone, ...)."""
    return [
        (code, points * f(f"flag.{flag}"), f(f"flag.{flag}"))
        for flag, (code, points) in FLAG_POINTS.items()
    ]


class Prior:
    """Weight-of-evidence points on general signals.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> prior = Prior(cfg)
    >>> x = [0.0] * len(prior.layout.names)
    >>> x[prior.layout.index("flag.email_disposable")] = 1.0
    >>> [e.code for e in prior.evidence(x)]
    ['email.disposable']
    >>> round(prior.logit(x) - cfg.base_logit, 2)
    2.0
    >>> X = np.array([x, [0.0] * len(x)])
    >>> prior.points_matrix(X).sum(axis=1).round(2).tolist()
    [2.0, 0.0]
    """

    def __init__(self, config: ScoringConfig) -> None:
        self.config = config
        self.layout = FeatureLayout.of(config)
        self._index = {name: i for i, name in enumerate(self.layout.names)}
        self._index.update(self._aliases(config))
        self.signals: list[Signal] = [
            shared_device,
            young_hub,
            label_history(config.label_kinds),
            takeover,
            account_velocity,
            flags,
        ]
        self.codes = [code for code, _, _ in self._run(lambda name: 0.0, SCALAR)]

    def _aliases(self, config: ScoringConfig) -> dict[str, int]:
        """Signals are written with the default horizons' names (``_1d``/``_30d`` fan-out
        windows, ``n_1h``); these point them at the configured short and long windows and at
        the shortest half-life, so another configuration keeps every signal working."""
        short, long_ = (horizon_label(w) for w in config.fanout_windows_s)
        shortest = horizon_label(min(config.half_lives_s))
        out = {}
        for name, i in self._index.items():
            kind, _, stat = name.partition(".")
            if stat.endswith(f"s_{short}"):
                out[f"{kind}.{stat[: -len(short)]}1d"] = i
            elif stat.endswith(f"s_{long_}"):
                out[f"{kind}.{stat[: -len(long_)]}30d"] = i
            elif stat == f"n_{shortest}":
                out[f"{kind}.n_1h"] = i
        return {alias: i for alias, i in out.items() if alias not in self._index}

    def _run(self, f: Callable[[str], Number], ops: Ops) -> list[tuple[str, Number, Number]]:
        return [triple for signal in self.signals for triple in signal(f, ops)]

    def evidence(self, x: Sequence[float]) -> list[Evidence]:
        """All evidence with positive points for one event, largest first."""
        index = self._index

        def f(name: str) -> float:
            i = index.get(name)
            return 0.0 if i is None else x[i]

        found = [
            Evidence(float(points), code, float(value))
            for code, points, value in self._run(f, SCALAR)
            if points > 0.0
        ]
        found.sort(key=lambda e: -e.points)
        return found

    def points(self, x: Sequence[float]) -> float:
        """Sum of the evidence points for one event."""
        return sum(e.points for e in self.evidence(x))

    def logit(self, x: Sequence[float]) -> float:
        """Base log-odds plus the points of every piece of evidence."""
        return self.config.base_logit + self.points(x)

    def points_matrix(self, features: np.ndarray) -> np.ndarray:
        """Points of every signal code (columns, in `codes` order) for a batch (rows)."""
        return self.evaluate_matrix(features)[0]

    def evaluate_matrix(self, features: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Points (negative ones as 0) and quoted values of every code, for a batch of events."""
        n = features.shape[0]
        index = self._index
        zeros = np.zeros(n)

        def f(name: str) -> np.ndarray:
            i = index.get(name)
            return zeros if i is None else features[:, i]

        triples = self._run(f, VECTOR)
        points = np.column_stack([np.broadcast_to(p, (n,)) for _, p, _ in triples])
        values = np.column_stack([np.broadcast_to(v, (n,)) for _, _, v in triples])
        return np.where(points > 0.0, points, 0.0), values
