"""Sessions and events of the demo scenario as integer columns, before any text is made.

A session is one visit: it opens with a sign-up or a login (or neither, when the user was still
logged in) and holds zero or more checkouts, all from one device and one address. Benign users and
attackers alike are written as sessions; `expand` turns them into events.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, fields

import numpy as np

from service.scenario_time import MS_PER_S

SIGNUP, LOGIN, CHECKOUT = 0, 1, 2
EVENT_TYPES = ("signup", "login", "checkout")
LEAD_NONE = -1

SEGMENTS = (
    "benign",
    "benign:promo",
    "benign:campus",
    "benign:shared_device",
    "benign:new_device",
    "benign:vpn",
    "benign:ipv6_privacy",
    "benign:carrier",
    "attack:device_farm",
    "attack:proxy_rotation",
    "attack:slow_campaign",
    "attack:takeover",
)
SEG = {name: code for code, name in enumerate(SEGMENTS)}
ATTACK_SHAPES = tuple(s.split(":", 1)[1] for s in SEGMENTS if s.startswith("attack:"))

AmountFn = Callable[[np.random.Generator, int], np.ndarray]


def _concat(cls: type, parts: list) -> object:  # type: ignore[type-arg]
    cols = {f.name: np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(cls)}
    return cls(**cols)


@dataclass
class Addresses:
    """One address per row: `ver` 4 or 6 (0: none), IPv4 in `lo`, IPv6 as `hi`/`lo` halves."""

    ver: np.ndarray  # int8
    hi: np.ndarray  # uint64
    lo: np.ndarray  # uint64

    @classmethod
    def v4(cls, values: np.ndarray) -> Addresses:
        n = len(values)
        return cls(np.full(n, 4, np.int8), np.zeros(n, np.uint64), values.astype(np.uint64))

    @classmethod
    def empty(cls, n: int) -> Addresses:
        return cls(np.zeros(n, np.int8), np.zeros(n, np.uint64), np.zeros(n, np.uint64))

    def put(self, sel: np.ndarray, other: Addresses) -> None:
        """Overwrite the rows `sel` (a boolean mask) with `other`, in order."""
        self.ver[sel], self.hi[sel], self.lo[sel] = other.ver, other.hi, other.lo


@dataclass
class Sessions:
    ts_ms: np.ndarray  # int64, when the session opens
    account: np.ndarray  # int64, global account index
    lead: np.ndarray  # int8: SIGNUP, LOGIN or LEAD_NONE
    n_checkout: np.ndarray  # int64
    device: np.ndarray  # int64, -1 for none
    ip_ver: np.ndarray
    ip_hi: np.ndarray
    ip_lo: np.ndarray
    segment: np.ndarray  # int16 code into SEGMENTS

    @classmethod
    def make(
        cls,
        ts_ms: np.ndarray,
        account: np.ndarray,
        lead: np.ndarray | int,
        n_checkout: np.ndarray | int,
        device: np.ndarray | int,
        ip: Addresses,
        segment: np.ndarray | int,
    ) -> Sessions:
        n = len(ts_ms)
        return cls(
            ts_ms=np.asarray(ts_ms, np.int64),
            account=np.asarray(account, np.int64),
            lead=np.broadcast_to(lead, (n,)).astype(np.int8),
            n_checkout=np.broadcast_to(n_checkout, (n,)).astype(np.int64),
            device=np.broadcast_to(device, (n,)).astype(np.int64),
            ip_ver=ip.ver,
            ip_hi=ip.hi,
            ip_lo=ip.lo,
            segment=np.broadcast_to(segment, (n,)).astype(np.int16),
        )

    def __len__(self) -> int:
        return len(self.ts_ms)


@dataclass
class EventBatch:
    ts_ms: np.ndarray
    kind: np.ndarray  # int8: SIGNUP, LOGIN, CHECKOUT
    account: np.ndarray
    device: np.ndarray
    ip_ver: np.ndarray
    ip_hi: np.ndarray
    ip_lo: np.ndarray
    amount: np.ndarray  # float64, NaN except on checkouts
    segment: np.ndarray

    @staticmethod
    def concat(parts: list[EventBatch]) -> EventBatch:
        out = _concat(EventBatch, parts)
        assert isinstance(out, EventBatch)
        return out

    def __len__(self) -> int:
        return len(self.ts_ms)


def concat_sessions(parts: list[Sessions]) -> Sessions:
    out = _concat(Sessions, parts)
    assert isinstance(out, Sessions)
    return out


def checkout_counts(rng: np.random.Generator, n: int, probs: tuple[float, ...]) -> np.ndarray:
    """Checkouts per session: 0, 1, 2, ... with the given probabilities."""
    p = np.asarray(probs, dtype=float)
    return rng.choice(len(p), size=n, p=p / p.sum()).astype(np.int64)


def expand(
    rng: np.random.Generator, s: Sessions, amount_fn: AmountFn, gap_mean_s: float = 300.0
) -> EventBatch:
    """Events of each session: the opening event at the session time, then its checkouts, each
    a few minutes (exponential gaps, at least one second) after the one before."""
    has_lead = s.lead != LEAD_NONE
    count = has_lead.astype(np.int64) + s.n_checkout
    row = np.repeat(np.arange(len(s)), count)
    first = np.cumsum(count) - count
    pos = np.arange(len(row)) - first[row]  # position inside the session
    is_lead = has_lead[row] & (pos == 0)
    gap = np.maximum(rng.exponential(gap_mean_s, len(row)), 1.0) * MS_PER_S
    gap = np.where(pos == 0, 0.0, gap).astype(np.int64)
    csum = np.cumsum(gap)
    offset = csum - (csum - gap)[first[row]]  # cumulative gap from the session's first event
    kind = np.where(is_lead, s.lead[row], CHECKOUT).astype(np.int8)
    amount = np.full(len(row), np.nan)
    amount[kind == CHECKOUT] = amount_fn(rng, int((kind == CHECKOUT).sum()))
    return EventBatch(
        ts_ms=s.ts_ms[row] + offset,
        kind=kind,
        account=s.account[row],
        device=s.device[row],
        ip_ver=s.ip_ver[row],
        ip_hi=s.ip_hi[row],
        ip_lo=s.ip_lo[row],
        amount=amount,
        segment=s.segment[row],
    )


def lognormal_amounts(median: float, sigma: float, cap: float = 9_000.0) -> AmountFn:
    """Prices around `median`, rounded to cents; a third end in .99 like shop prices."""

    def draw(rng: np.random.Generator, n: int) -> np.ndarray:
        x = np.clip(rng.lognormal(np.log(median), sigma, n), 1.0, cap)
        x = np.round(x, 2)
        price_point = rng.random(n) < 0.33
        x[price_point] = np.floor(x[price_point]) + 0.99
        return np.asarray(x)

    return draw


def uniform_amounts(lo: float, hi: float) -> AmountFn:
    def draw(rng: np.random.Generator, n: int) -> np.ndarray:
        return np.asarray(np.round(rng.uniform(lo, hi, n), 2))

    return draw
