"""Stage clock and progress line of ``emberscore backfill`` (standard library only).

`Progress` always measures how long each stage takes (the summary prints it); it draws a one-line
progress display on a stream only when asked to, which `run_backfill` does when stderr is a
terminal and ``--no-progress`` was not given. The line is redrawn in place with a carriage
return, at most ten times a second, and shows the stage, a bar, the rows done, the speed and
the time left. No third-party progress library is needed for one line of text.
"""

from __future__ import annotations

import shutil
import time
from collections.abc import Callable
from typing import TextIO

STAGES = ("reading", "planning", "features", "learning", "scoring", "writing")
REDRAW_S = 0.1
BAR_CELLS = 24


def _seconds(value: float) -> str:
    """A duration for people: ``42 s``, ``3 min 05 s``, ``1 h 02 min``."""
    whole = round(value)
    if whole < 60:
        return f"{value:.1f} s" if value < 10 else f"{whole} s"
    minutes, seconds = divmod(whole, 60)
    if minutes < 60:
        return f"{minutes} min {seconds:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


class Progress:
    """Times the stages of a run and, given a stream, shows where the run is.

    Parameters
    ----------
    stream
        Where to draw the progress line (None: measure only).
    total_rows
        Events in the run, the length of the bar.
    clock
        Seconds from an arbitrary start (a monotonic clock).
    """

    def __init__(
        self,
        stream: TextIO | None = None,
        total_rows: int = 0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.stream = stream
        self.total_rows = total_rows
        self.clock = clock
        self.started = clock()
        self.seconds: dict[str, float] = {}
        self.current: str | None = None
        self._since = self.started
        self._rows = 0
        self._reused = 0  # rows taken from a checkpoint rather than processed
        self._rows_started: float | None = None
        self._drawn = 0.0
        self._width = 0

    def stage(self, name: str) -> None:
        """Enter stage ``name`` (time spent so far goes to the stage being left)."""
        now = self.clock()
        self._close_stage(now)
        self.current = name
        self._since = now
        self._draw(now, force=True)

    def rows(self, done: int, *, reused: bool = False) -> None:
        """``done`` rows of the run are through; ``reused`` when the latest ones came from a
        checkpoint (they do not count towards the speed)."""
        now = self.clock()
        if self._rows_started is None:
            self._rows_started = now
        if reused:
            self._reused += done - self._rows
        self._rows = done
        self._draw(now)

    def rate(self) -> float | None:
        """Rows per second over the rows processed in this run, or None before any."""
        if self._rows_started is None:
            return None
        elapsed = self.clock() - self._rows_started
        fresh = self._rows - self._reused
        return fresh / elapsed if elapsed > 0 and fresh > 0 else None

    def finish(self) -> dict[str, float]:
        """Close the last stage, clear the line; seconds per stage."""
        self._close_stage(self.clock())
        self.current = None
        if self.stream is not None and self._width:
            self.stream.write("\r" + " " * self._width + "\r")
            self.stream.flush()
            self._width = 0
        return dict(self.seconds)

    def wall_s(self) -> float:
        return self.clock() - self.started

    def _close_stage(self, now: float) -> None:
        if self.current is not None:
            spent = now - self._since
            self.seconds[self.current] = self.seconds.get(self.current, 0.0) + spent

    def line(self) -> str:
        """The text of the progress line for the current state."""
        name = self.current or ""
        number = STAGES.index(name) + 1 if name in STAGES else None
        head = f"[{number}/{len(STAGES)} {name}]" if number else f"[{name}]"
        so_far = f"{_seconds(self.wall_s())} so far"
        if not self.total_rows:
            return f"{head} {so_far}"
        if self._rows_started is None:
            return f"{head} {self.total_rows:,} events, {so_far}"
        share = min(1.0, self._rows / self.total_rows)
        filled = round(share * BAR_CELLS)
        bar = "#" * filled + "." * (BAR_CELLS - filled)
        text = f"{head} {bar} {self._rows:,}/{self.total_rows:,} ({share:.0%})"
        rate = self.rate()
        if rate is not None:
            left = (self.total_rows - self._rows) / rate
            text += f"  {rate:,.0f} events/s  {_seconds(left)} left"
        return text

    def _draw(self, now: float, force: bool = False) -> None:
        if self.stream is None or (not force and now - self._drawn < REDRAW_S):
            return
        self._drawn = now
        columns = shutil.get_terminal_size((100, 24)).columns - 1
        text = self.line()[:columns]
        pad = max(0, self._width - len(text))
        self.stream.write("\r" + text + " " * pad)
        self.stream.flush()
        self._width = len(text)
