"""The load generator's arithmetic: the open-loop schedule and exact latency percentiles.

Pure functions and a value type, no I/O; `loadtest.load` runs the schedule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


def request_count(duration_s: float, rate_per_s: float) -> int:
    """Requests scheduled in ``duration_s`` at ``rate_per_s``: those intended before the end.

    >>> request_count(2.0, 40.0), request_count(0.3, 10.0), request_count(1.0, 2.5)
    (80, 3, 3)
    """
    # The tolerance keeps 0.3 s x 10/s at 3 despite binary rounding (3.0000000000000004).
    return max(0, math.ceil(duration_s * rate_per_s - 1e-9))


def intended_offset_s(i: int, rate_per_s: float) -> float:
    """Intended send time of request ``i``, in seconds after the start: ``i / rate``.

    Computed from ``i`` each time, never by adding intervals, so no rounding error accumulates.

    >>> intended_offset_s(0, 1000.0), intended_offset_s(1500, 1000.0)
    (0.0, 1.5)
    """
    return i / rate_per_s


def percentile(sorted_values: list[float], q: float) -> float:
    """The ``q``-th percentile (0 to 100) of ascending values, by linear interpolation.

    The position ``(n - 1) * q / 100`` between ranks, as numpy's default method "linear"
    (definition 7 of Hyndman and Fan, 1996). NaN for no values.

    >>> percentile([10.0, 20.0, 30.0, 40.0], 50.0)
    25.0
    """
    if not sorted_values:
        return math.nan
    if not 0.0 <= q <= 100.0:
        raise ValueError(f"percentile must be from 0 to 100, got {q}")
    position = (len(sorted_values) - 1) * (q / 100.0)
    lo = math.floor(position)
    hi = min(lo + 1, len(sorted_values) - 1)
    a, b, t = sorted_values[lo], sorted_values[hi], position - lo
    # Interpolate from the nearer end, as numpy does, so that t = 1 gives b exactly.
    return a + (b - a) * t if t < 0.5 else b - (b - a) * (1.0 - t)


@dataclass(frozen=True)
class LatencySummary:
    """Percentiles and maximum of a set of latencies, in milliseconds (exact sort)."""

    count: int
    p50_ms: float
    p95_ms: float
    p99_ms: float
    p999_ms: float
    max_ms: float

    @classmethod
    def of(cls, samples_s: list[float]) -> LatencySummary:
        """Summarise latencies given in seconds.

        >>> LatencySummary.of([0.001, 0.002, 0.003]).p50_ms
        2.0
        """
        ms = sorted(s * 1000.0 for s in samples_s)
        p50, p95, p99, p999 = (percentile(ms, q) for q in (50.0, 95.0, 99.0, 99.9))
        return cls(len(ms), p50, p95, p99, p999, ms[-1] if ms else math.nan)

    def line(self) -> str:
        return (
            f"p50 {self.p50_ms:8.2f}   p95 {self.p95_ms:8.2f}   p99 {self.p99_ms:8.2f}   "
            f"p99.9 {self.p999_ms:8.2f}   max {self.max_ms:8.2f}"
        )
