"""Forward-decay counters: sums that fade with a half-life, kept in an order-insensitive form.

A decayed count at time ``t`` of events at times ``t_i`` with weights ``w_i`` is::

    C(t) = sum_i w_i * 2 ** (-(t - t_i) / h)

Forward decay (Cormode, Shkapenyuk, Srivastava and Xu, "Forward Decay: A Practical Time Decay
Model for Streaming Systems", ICDE 2009) rewrites it against a landmark ``L``::

    S = sum_i w_i * 2 ** ((t_i - L) / h)        C(t) = S * 2 ** (-(t - L) / h)

so that each event adds a number that does not depend on when the sum is read. Additions commute:
late or concurrent events give the same sum in any order, and two sums against the same landmark
merge by addition. This is what lets a store apply an event with a plain increment and no
read-modify-write.

The exponent grows with ``t - L``, and a float64 overflows past ``2 ** 1024``. Landmarks are
therefore global *epochs* of `EPOCH_HALF_LIVES` half-lives: ``L_e = e * EPOCH_HALF_LIVES * h``.
An event adds to the sum of its own epoch; a reader adds up the epochs it has. At most two epochs
matter at any time: a sum two epochs old has faded by ``2 ** -512`` relative to its own size, and
is dropped. Because epochs are a function of time alone, every worker and every store agrees on
them without coordination.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

EPOCH_HALF_LIVES = 512
"""Half-lives per landmark epoch. ``2 ** 512`` (about 1.3e154) leaves ``2 ** 511`` of headroom for
the weights and event counts added within one epoch before a float64 overflows."""


def epoch_length_s(half_life_s: float) -> float:
    """Length of one landmark epoch in seconds.

    >>> epoch_length_s(3600.0) / 86400   # a 1-hour counter moves its landmark every ~21 days
    21.333333333333332
    """
    return EPOCH_HALF_LIVES * half_life_s


def epoch_of(t_s: float, half_life_s: float) -> int:
    """The landmark epoch that time ``t_s`` belongs to.

    >>> epoch_of(0.0, 3600.0), epoch_of(1_843_200.0, 3600.0)
    (0, 1)
    """
    return math.floor(t_s / (EPOCH_HALF_LIVES * half_life_s))


def forward_weight(t_s: float, half_life_s: float) -> tuple[int, float]:
    """Epoch of ``t_s`` and the forward-decay factor ``2 ** ((t_s - L) / h)`` against its landmark.

    >>> forward_weight(7200.0, 3600.0)
    (0, 4.0)
    """
    epoch = epoch_of(t_s, half_life_s)
    landmark = epoch * EPOCH_HALF_LIVES * half_life_s
    return epoch, 2.0 ** ((t_s - landmark) / half_life_s)


def decayed_value(sums: Mapping[int, float], t_s: float, half_life_s: float) -> float:
    """Read forward-decay ``sums`` (epoch -> sum) as a decayed value at ``t_s``.

    >>> decayed_value({0: 4.0}, 7200.0, 3600.0)   # one event at t=7200, read at t=7200
    1.0
    >>> decayed_value({0: 4.0}, 10800.0, 3600.0)  # one half-life later
    0.5
    """
    total = 0.0
    for epoch, value in sums.items():
        age_half_lives = (t_s - epoch * EPOCH_HALF_LIVES * half_life_s) / half_life_s
        if age_half_lives < 1074.0:  # beyond this 2**-x underflows to zero anyway
            total += value * 2.0 ** (-age_half_lives)
    return total


@dataclass
class DecayedCounter:
    """A sum of weighted events that halves every ``half_life_s`` seconds without new events.

    Parameters
    ----------
    half_life_s
        Seconds after which an event counts half.
    sums
        Forward-decay state: epoch -> sum of ``w * 2 ** ((t - L_epoch) / h)``.

    Examples
    --------
    >>> c = DecayedCounter(half_life_s=3600.0)
    >>> c.update(0.0).update(0.0).get(0.0)
    2.0
    >>> c.get(3600.0)                      # one half-life later
    1.0
    >>> merged = c + DecayedCounter(3600.0).update(3600.0)
    >>> merged.get(3600.0)
    2.0
    >>> DecayedCounter.from_state(3600.0, c.to_state()) == c
    True
    """

    half_life_s: float
    sums: dict[int, float] = field(default_factory=dict)

    def update(self, t_s: float, w: float = 1.0) -> DecayedCounter:
        """Add an event of weight ``w`` at time ``t_s`` (any order); returns self."""
        epoch, factor = forward_weight(t_s, self.half_life_s)
        self.sums[epoch] = self.sums.get(epoch, 0.0) + w * factor
        self._drop_faded()
        return self

    def revert(self, t_s: float, w: float = 1.0) -> DecayedCounter:
        """Undo `update` with the same arguments (up to float rounding); returns self."""
        return self.update(t_s, -w)

    def get(self, t_s: float) -> float:
        """The decayed value at time ``t_s``."""
        return decayed_value(self.sums, t_s, self.half_life_s)

    def __add__(self, other: DecayedCounter) -> DecayedCounter:
        if other.half_life_s != self.half_life_s:
            raise ValueError(
                f"cannot merge counters with half-lives {self.half_life_s} s "
                f"and {other.half_life_s} s"
            )
        merged = dict(self.sums)
        for epoch, value in other.sums.items():
            merged[epoch] = merged.get(epoch, 0.0) + value
        out = DecayedCounter(self.half_life_s, merged)
        out._drop_faded()
        return out

    def to_state(self) -> dict[int, float]:
        """Plain numbers (epoch -> sum) that `from_state` restores exactly."""
        return dict(self.sums)

    @classmethod
    def from_state(cls, half_life_s: float, state: Mapping[int, float]) -> DecayedCounter:
        """Rebuild a counter from `to_state` output."""
        return cls(half_life_s, {int(k): float(v) for k, v in state.items()})

    def _drop_faded(self) -> None:
        # Keep the newest two epochs: an older sum has faded by 2**-512 relative to its size.
        if len(self.sums) > 2:
            newest = max(self.sums)
            for epoch in [e for e in self.sums if e < newest - 1]:
                del self.sums[epoch]


def brute_force_decayed_sum(
    events: Iterable[tuple[float, float]], t_s: float, half_life_s: float
) -> float:
    """Reference definition: ``sum(w * 2 ** (-(t - t_i) / h))`` over (t_i, w) pairs.

    >>> brute_force_decayed_sum([(0.0, 1.0), (3600.0, 1.0)], 3600.0, 3600.0)
    1.5
    """
    return math.fsum(w * 2.0 ** (-(t_s - t_i) / half_life_s) for t_i, w in events)
