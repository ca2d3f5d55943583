"""Write-behind: writes that must not hold up a request, drained in pipelines by one task.

`commit` and the shadow log only add work here; a background task takes everything queued,
up to `batch` items at a time, and runs it as one pipeline. The queue is bounded: when Redis is
slower than the traffic for long enough to fill it, further writes are dropped and counted
(`counters`), never allowed to grow memory or to block a request.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Awaitable, Callable
from typing import Any

Write = Callable[[Any], None]
"""Adds its commands to the pipeline it is given."""


class WriteBehind:
    """A bounded queue of writes and the task that drains it.

    Parameters
    ----------
    run
        Runs a list of writes as one pipeline; what it raises is counted as failed writes and
        kept in `last_error`.
    capacity
        Writes that may wait; past that, `submit` drops and counts.
    batch
        Writes per pipeline at most.
    """

    def __init__(
        self, run: Callable[[list[Write]], Awaitable[None]], capacity: int, batch: int
    ) -> None:
        self._run = run
        self._queue: asyncio.Queue[Write] = asyncio.Queue(capacity)
        self._batch = batch
        self._task: asyncio.Task[None] | None = None
        self.counters = {"written": 0, "dropped": 0, "failed": 0}
        self.last_error: Exception | None = None

    def submit(self, write: Write) -> bool:
        """Queue a write; False (and counted as dropped) when the queue is full."""
        if self._task is None or self._task.done():
            self._task = asyncio.get_running_loop().create_task(self._drain())
        try:
            self._queue.put_nowait(write)
        except asyncio.QueueFull:
            self.counters["dropped"] += 1
            return False
        return True

    @property
    def depth(self) -> int:
        """Writes waiting now."""
        return self._queue.qsize()

    async def flush(self) -> None:
        """Wait until every write queued so far has been run (or has failed and been counted)."""
        if self._task is not None and not self._task.done():
            await self._queue.join()

    async def close(self) -> None:
        """Flush, then stop the task."""
        await self.flush()
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._task = None

    async def _drain(self) -> None:
        while True:
            writes = [await self._queue.get()]
            while len(writes) < self._batch and not self._queue.empty():
                writes.append(self._queue.get_nowait())
            try:
                await self._run(writes)
                self.counters["written"] += len(writes)
            except Exception as exc:  # the task must outlive any failure, or flush() would hang
                self.counters["failed"] += len(writes)
                self.last_error = exc
            finally:
                for _ in writes:
                    self._queue.task_done()
