"""One identifier's statistics, and how an event changes them.

A `Profile` holds, for one (kind, keyed hash) identifier:

- decayed event counts at each configured half-life (forward-decay sums per epoch, `decay`);
- decayed confirmed-fraud and confirmed-legitimate label counts, anchored at the labelled event's
  time (so they fade exactly as that event's own count does) and added when the label arrives;
- a decayed sum of amounts (for the kind named by ``amount_kind``);
- first and last seen, in whole seconds;
- fan-out sketches towards other kinds (`fanout.RecentDistinct` state, bucket -> last second).

Every change is an addition (counts, labels, amounts), a maximum (last seen, fan-out buckets) or a
minimum (first seen), so events and labels commute, retries can be undone exactly, and a store can
apply them with plain increments. `to_members` / `from_members` give the flat form a store keeps
(member name -> number); member names are short because there are millions of records.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.decay import EPOCH_HALF_LIVES, decayed_value, forward_weight


@dataclass(frozen=True, slots=True)
class TimeBasis:
    """Per-event time constants shared by every identifier of the event.

    ``epochs[j]`` and ``factors[j]`` are the landmark epoch and forward-decay factor of the event
    time for half-life ``j``; ``label_*`` the same for the label half-life.

    >>> b = TimeBasis.at(7200.0, ScoringConfig())
    >>> b.epochs[0], b.factors[0]
    (0, 4.0)
    """

    t_s: float
    epochs: tuple[int, ...]
    factors: tuple[float, ...]
    label_epoch: int
    label_factor: float

    @classmethod
    def at(cls, t_s: float, config: ScoringConfig) -> TimeBasis:
        pairs = [forward_weight(t_s, h) for h in config.half_lives_s]
        label_epoch, label_factor = forward_weight(t_s, config.label_half_life_s)
        return cls(
            t_s,
            tuple(e for e, _ in pairs),
            tuple(f for _, f in pairs),
            label_epoch,
            label_factor,
        )


def _add(sums: dict[int, float], epoch: int, value: float) -> None:
    sums[epoch] = sums.get(epoch, 0.0) + value
    if len(sums) > 2:  # an epoch two behind has faded by 2**-512: drop it (bounded size)
        newest = max(sums)
        for stale in [e for e in sums if e < newest - 1]:
            del sums[stale]


class Profile:
    """Statistics of one identifier; see the module docstring.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> p = Profile(cfg)
    >>> p.record(TimeBasis.at(1_000.0, cfg), fanout_hits=(("a", 5),), amount=None)
    >>> p.record(TimeBasis.at(4_600.0, cfg), fanout_hits=(("a", 9),), amount=None)
    >>> round(p.count(0, 4_600.0, cfg), 6), p.first_s, p.last_s, sorted(p.fanout["a"])
    (1.5, 1000, 4600, [5, 9])
    >>> Profile.from_members(p.to_members(), cfg) == p
    True
    """

    __slots__ = ("amount", "bad", "counts", "fanout", "first_s", "good", "last_s")

    def __init__(self, config: ScoringConfig) -> None:
        self.counts: list[dict[int, float]] = [{} for _ in config.half_lives_s]
        self.bad: dict[int, float] = {}
        self.good: dict[int, float] = {}
        self.amount: dict[int, float] = {}
        self.first_s: int | None = None
        self.last_s: int | None = None
        self.fanout: dict[str, dict[int, int]] = {}

    def record(
        self,
        basis: TimeBasis,
        fanout_hits: Sequence[tuple[str, int]],
        amount: float | None,
        weight: float = 1.0,
    ) -> None:
        """Apply one event (``weight=-1`` undoes the additive part of an identical event)."""
        for sums, epoch, factor in zip(self.counts, basis.epochs, basis.factors, strict=True):
            if epoch in sums:
                sums[epoch] += weight * factor
            else:
                _add(sums, epoch, weight * factor)
        if amount is not None:
            last = len(basis.epochs) - 1
            _add(self.amount, basis.epochs[last], weight * amount * basis.factors[last])
        if weight < 0:
            return
        t = int(basis.t_s)
        if self.first_s is None or t < self.first_s:
            self.first_s = t
        if self.last_s is None or t > self.last_s:
            self.last_s = t
        for letter, bucket in fanout_hits:
            buckets = self.fanout.setdefault(letter, {})
            if t > buckets.get(bucket, -1):
                buckets[bucket] = t

    def add_label(self, basis: TimeBasis, is_fraud: bool, weight: float = 1.0) -> None:
        """Add a label for an event at ``basis.t_s`` (the event's time, not the label's)."""
        target = self.bad if is_fraud else self.good
        _add(target, basis.label_epoch, weight * basis.label_factor)

    def count(self, index: int, t_s: float, config: ScoringConfig) -> float:
        """Decayed event count at half-life ``config.half_lives_s[index]``."""
        return decayed_value(self.counts[index], t_s, config.half_lives_s[index])

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Profile):
            return NotImplemented
        return all(getattr(self, s) == getattr(other, s) for s in self.__slots__)

    __hash__ = None  # type: ignore[assignment]

    def to_members(self) -> dict[str, float]:
        """Flat form: ``{j}.{epoch}`` (counter j), ``b.``/``g.``/``s.{epoch}``, ``f``, ``l``,
        ``{letter}{bucket}``. Names are short: there are millions of records."""
        out: dict[str, float] = {}
        for j, sums in enumerate(self.counts):
            out.update({f"{j}.{e}": v for e, v in sums.items()})
        for prefix, sums in (("b", self.bad), ("g", self.good), ("s", self.amount)):
            out.update({f"{prefix}.{e}": v for e, v in sums.items()})
        if self.first_s is not None:
            out["f"] = float(self.first_s)
        if self.last_s is not None:
            out["l"] = float(self.last_s)
        for letter, buckets in self.fanout.items():
            out.update({f"{letter}{b}": float(t) for b, t in buckets.items()})
        return out

    @classmethod
    def from_members(cls, members: Mapping[str, float], config: ScoringConfig) -> Profile:
        """Rebuild a profile from `to_members` output (unknown members are ignored)."""
        p = cls(config)
        sums = {f"{j}.": s for j, s in enumerate(p.counts)}
        sums.update({"b.": p.bad, "g.": p.good, "s.": p.amount})
        for name, value in members.items():
            # Every record holds the same few hundred names: each is parsed once per process.
            parsed = _PARSED.get(name) or _parse_member(name)
            group, key = parsed
            number = float(value)
            target = sums.get(group)
            if target is not None:
                target[key] = number
            elif group == "f":
                p.first_s = int(number)
            elif group == "l":
                p.last_s = int(number)
            elif group in _TARGET_LETTERS:
                p.fanout.setdefault(group, {})[key] = int(number)
        return p


def _parse_member(name: str) -> tuple[str, int]:
    """A member name as (group, key): ``("1.", epoch)`` for a counter's sum, ``("b.", epoch)``
    for a label or amount sum, ``("f", 0)``, ``("l", 0)``, ``(letter, bucket)`` for a fan-out
    bucket, and ``("", 0)`` for a name `Profile` does not know; remembered in `_PARSED`.

    >>> _parse_member("1.3"), _parse_member("a17"), _parse_member("x.3")
    (('1.', 3), ('a', 17), ('', 0))
    """
    head, _, epoch = name.partition(".")
    parsed = ("", 0)
    if epoch:
        if head in ("b", "g", "s"):
            parsed = (f"{head}.", int(epoch))
        elif head.isdigit():
            parsed = (f"{int(head)}.", int(epoch))
    elif name in ("f", "l"):
        parsed = (name, 0)
    elif name[:1] in _TARGET_LETTERS and name[1:].isdigit():
        parsed = (name[0], int(name[1:]))
    if len(_PARSED) >= PARSED_MEMO:
        _PARSED.clear()
    _PARSED[name] = parsed
    return parsed


PARSED_MEMO = 4096
"""Member names `_parse_member` remembers: a few hundred are in use at any time (two epochs of
each sum, the fan-out buckets), so the memo is only cleared if something unexpected fills it."""
_PARSED: dict[str, tuple[str, int]] = {}
_TARGET_LETTERS = frozenset(KIND_LETTERS.values())

__all__ = ["EPOCH_HALF_LIVES", "Profile", "TimeBasis"]
