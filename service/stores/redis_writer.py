"""Write-behind: writes that must not hold up a request, sent in batches by one task.

`commit` and the shadow log only add work here; a background task takes everything waiting,
up to `batch` writes at a time, and runs it as one exchange. When it finds fewer than `batch`
waiting, it first waits `linger_s` for more, so that at moderate traffic one exchange still
carries several events' writes (unless someone is waiting in `flush`). The buffer is bounded:
when Redis is slower than the traffic for long enough to fill it, further writes are dropped and
counted (`counters`), never allowed to grow memory or to block a request.

Writes wait in a plain list rather than an `asyncio.Queue`: a request only appends to it, and
the task takes a whole batch at once, so there is no per-write wake-up or hand-over.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Awaitable, Callable, Sequence

from service.stores.redis_wire import Command

Write = Sequence[Command]
"""The commands of one write (plain data: sent as they are)."""


class WriteBehind:
    """A bounded buffer of writes and the task that sends it.

    Parameters
    ----------
    run
        Runs a list of writes as one exchange; what it raises is counted as failed writes and
        kept in `last_error`.
    capacity
        Writes that may wait; past that, `submit` drops and counts.
    batch
        Writes per exchange at most.
    linger_s
        How long to wait for more writes when fewer than ``batch`` are waiting.
    """

    def __init__(
        self,
        run: Callable[[list[Write]], Awaitable[None]],
        capacity: int,
        batch: int,
        linger_s: float = 0.0,
    ) -> None:
        self._run = run
        self._capacity = capacity
        self._batch = batch
        self._linger_s = linger_s
        self._waiting: list[Write] = []
        self._queued = 0  # writes accepted so far
        self._settled = 0  # of those, written or failed
        self._wake: asyncio.Future[None] | None = None  # the task sleeps on it
        self._lingering: asyncio.TimerHandle | None = None  # set while it lingers
        self._flushes: list[tuple[int, asyncio.Future[None]]] = []
        self._task: asyncio.Task[None] | None = None
        self.counters = {"written": 0, "dropped": 0, "failed": 0}
        self.last_error: Exception | None = None

    def submit(self, write: Write) -> bool:
        """Queue a write; False (and counted as dropped) when the buffer is full."""
        if len(self._waiting) >= self._capacity:
            self.counters["dropped"] += 1
            return False
        self._waiting.append(write)
        self._queued += 1
        if self._task is None or self._task.done():
            self._task = asyncio.get_running_loop().create_task(self._drain())
        elif len(self._waiting) >= self._batch:
            self._nudge()
        elif self._wake is not None and not self._wake.done() and self._lingering is None:
            self._nudge()  # the task sleeps with nothing to do: start the linger
        return True

    @property
    def depth(self) -> int:
        """Writes waiting now."""
        return len(self._waiting)

    async def flush(self) -> None:
        """Wait until every write queued so far has been run (or has failed and been counted);
        they go at once, without lingering for more."""
        if self._settled >= self._queued or self._task is None or self._task.done():
            return
        done = asyncio.get_running_loop().create_future()
        self._flushes.append((self._queued, done))
        self._nudge()
        await done

    async def close(self) -> None:
        """Flush, then stop the task."""
        await self.flush()
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._task = None

    def _nudge(self) -> None:
        if self._wake is not None and not self._wake.done():
            self._wake.set_result(None)

    async def _sleep(self, seconds: float | None) -> None:
        """Sleep until `_nudge` (or ``seconds``, when given)."""
        loop = asyncio.get_running_loop()
        self._wake = loop.create_future()
        if seconds is not None:
            self._lingering = loop.call_later(seconds, self._nudge)
        try:
            await self._wake
        finally:
            if self._lingering is not None:
                self._lingering.cancel()
                self._lingering = None
            self._wake = None

    async def _drain(self) -> None:
        while True:
            if not self._waiting:
                await self._sleep(None)
                continue
            if self._linger_s > 0 and not self._flushes and len(self._waiting) < self._batch:
                await self._sleep(self._linger_s)
            writes = self._waiting[: self._batch]
            del self._waiting[: self._batch]
            try:
                await self._run(writes)
                self.counters["written"] += len(writes)
            except Exception as exc:  # the task must outlive any failure, or flush() would hang
                self.counters["failed"] += len(writes)
                self.last_error = exc
            finally:
                self._settled += len(writes)
                self._release_flushes()

    def _release_flushes(self) -> None:
        still = []
        for target, done in self._flushes:
            if self._settled >= target:
                if not done.done():
                    done.set_result(None)
            else:
                still.append((target, done))
        self._flushes = still
