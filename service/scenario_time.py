"""Timestamps with a daily and weekly rhythm for the demo scenario.

Activity follows a local-time curve (quiet at night, a lunch bump, an evening peak) and a weekly
curve (busier towards the weekend). Both are invented shapes, common practice for synthetic
traffic, no source. Sampling is an exact inverse of the piecewise-constant hourly intensity, so
any number of timestamps, each with its own lower and upper bound, is drawn in one vector step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MS_PER_S = 1_000
MS_PER_MIN = 60_000
MS_PER_HOUR = 3_600_000
MS_PER_DAY = 86_400_000

# Relative activity per local hour 00..23 (invented).
HOUR_WEIGHTS = np.array(
    [0.35, 0.2, 0.12, 0.08, 0.07, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0, 1.05,
     1.2, 1.15, 1.0, 0.95, 1.0, 1.1, 1.3, 1.55, 1.7, 1.6, 1.2, 0.7],
)  # fmt: skip
# Relative activity Monday..Sunday (invented).
WEEKDAY_WEIGHTS = np.array([0.95, 0.93, 0.95, 1.0, 1.05, 1.12, 1.2])


@dataclass(frozen=True)
class TimeProfile:
    """Hourly activity over the window for one UTC offset, as a cumulative distribution.

    `start_ms` must fall on a Monday 00:00 UTC for the weekday weights to line up (the default
    scenario start does); other starts only shift the weekly curve.
    """

    start_ms: int
    n_hours: int
    weights: np.ndarray  # per hour, sums to 1
    cdf: np.ndarray  # length n_hours + 1, cdf[0] = 0, cdf[-1] = 1

    @classmethod
    def build(cls, start_ms: int, days: int, utc_offset_h: int) -> TimeProfile:
        hours = np.arange(days * 24)
        local = hours + utc_offset_h
        w = HOUR_WEIGHTS[local % 24] * WEEKDAY_WEIGHTS[(local // 24) % 7]
        w = w / w.sum()
        cdf = np.concatenate([[0.0], np.cumsum(w)])
        cdf[-1] = 1.0
        return cls(start_ms=start_ms, n_hours=len(hours), weights=w, cdf=cdf)

    @property
    def end_ms(self) -> int:
        return self.start_ms + self.n_hours * MS_PER_HOUR

    def cdf_at(self, ts_ms: np.ndarray) -> np.ndarray:
        """Share of the window's activity that lies before each time (clipped to the window)."""
        rel = np.clip(
            np.asarray(ts_ms, dtype=np.int64) - self.start_ms, 0, self.n_hours * MS_PER_HOUR
        )
        hour = np.minimum(rel // MS_PER_HOUR, self.n_hours - 1)
        frac = (rel - hour * MS_PER_HOUR) / MS_PER_HOUR
        return np.asarray(self.cdf[hour] + frac * self.weights[hour])

    def sample(
        self,
        rng: np.random.Generator,
        n: int,
        lo_ms: np.ndarray | int | None = None,
        hi_ms: np.ndarray | int | None = None,
    ) -> np.ndarray:
        """`n` whole-millisecond times following the rhythm, each inside its [lo, hi) bound."""
        lo = np.full(n, self.start_ms) if lo_ms is None else np.broadcast_to(lo_ms, (n,))
        hi = np.full(n, self.end_ms) if hi_ms is None else np.broadcast_to(hi_ms, (n,))
        u_lo, u_hi = self.cdf_at(lo), self.cdf_at(hi)
        u = u_lo + rng.random(n) * (u_hi - u_lo)
        hour = np.clip(np.searchsorted(self.cdf, u, side="right") - 1, 0, self.n_hours - 1)
        frac = np.clip((u - self.cdf[hour]) / self.weights[hour], 0.0, 1.0 - 1e-12)
        ts = self.start_ms + hour * MS_PER_HOUR + np.floor(frac * MS_PER_HOUR).astype(np.int64)
        # Guard the bounds against rounding at bin edges.
        return np.asarray(np.clip(ts, lo, np.maximum(np.asarray(hi) - 1, lo)), dtype=np.int64)


class Clock:
    """One `TimeProfile` per UTC offset, built on first use."""

    def __init__(self, start_ms: int, days: int) -> None:
        self.start_ms = start_ms
        self.days = days
        self.end_ms = start_ms + days * MS_PER_DAY
        self._profiles: dict[int, TimeProfile] = {}

    def profile(self, utc_offset_h: int) -> TimeProfile:
        if utc_offset_h not in self._profiles:
            self._profiles[utc_offset_h] = TimeProfile.build(self.start_ms, self.days, utc_offset_h)
        return self._profiles[utc_offset_h]

    def sample_by_offset(
        self,
        rng: np.random.Generator,
        offsets_h: np.ndarray,
        lo_ms: np.ndarray | int | None = None,
        hi_ms: np.ndarray | int | None = None,
    ) -> np.ndarray:
        """One time per element, each following the rhythm of its own UTC offset."""
        n = len(offsets_h)
        lo = np.broadcast_to(self.start_ms if lo_ms is None else lo_ms, (n,))
        hi = np.broadcast_to(self.end_ms if hi_ms is None else hi_ms, (n,))
        out = np.empty(n, dtype=np.int64)
        for off in np.unique(offsets_h):
            sel = np.flatnonzero(offsets_h == off)
            out[sel] = self.profile(int(off)).sample(rng, len(sel), lo[sel], hi[sel])
        return out
