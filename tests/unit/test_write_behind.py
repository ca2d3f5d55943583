"""`WriteBehind`: batching with a linger, flush, a bounded buffer, failures counted.

No Redis here: the run function records what it is given (the store passes its own, tested
with the store). Every check is about counts and order, never about how long anything took.
"""

from __future__ import annotations

import asyncio

from service.stores.redis_writer import Write, WriteBehind


class Recorder:
    def __init__(self, fail_first: int = 0) -> None:
        self.batches: list[list[Write]] = []
        self.fail_first = fail_first

    async def __call__(self, writes: list[Write]) -> None:
        self.batches.append(writes)
        if len(self.batches) <= self.fail_first:
            raise ConnectionError("store down")


def _write(i: int) -> Write:
    return [("SET", f"k{i}", i)]


def test_writes_submitted_together_go_in_one_batch_after_the_linger() -> None:
    async def main() -> None:
        run = Recorder()
        writer = WriteBehind(run, capacity=100, batch=50, linger_s=0.05)
        for i in range(5):
            writer.submit(_write(i))
        await asyncio.sleep(0)  # the task starts and lingers
        for i in range(5, 8):
            writer.submit(_write(i))  # arrive during the linger: same batch
        await writer.flush()
        assert [len(b) for b in run.batches] == [8]
        assert writer.counters == {"written": 8, "dropped": 0, "failed": 0}
        await writer.close()

    asyncio.run(main())


def test_flush_sends_at_once_and_waits_for_everything_queued() -> None:
    async def main() -> None:
        run = Recorder()
        writer = WriteBehind(run, capacity=100, batch=3, linger_s=3600.0)  # a linger never over
        for i in range(7):
            writer.submit(_write(i))
        await writer.flush()
        assert [w for b in run.batches for w in b] == [_write(i) for i in range(7)]
        assert max(len(b) for b in run.batches) <= 3
        assert writer.depth == 0
        await writer.close()

    asyncio.run(main())


def test_a_full_buffer_drops_and_counts() -> None:
    async def main() -> None:
        run = Recorder()
        writer = WriteBehind(run, capacity=4, batch=10, linger_s=3600.0)
        accepted = [writer.submit(_write(i)) for i in range(6)]
        assert accepted == [True] * 4 + [False] * 2
        await writer.flush()
        assert writer.counters == {"written": 4, "dropped": 2, "failed": 0}
        await writer.close()

    asyncio.run(main())


def test_a_failed_batch_is_counted_and_the_task_goes_on() -> None:
    async def main() -> None:
        run = Recorder(fail_first=1)
        writer = WriteBehind(run, capacity=100, batch=2, linger_s=0.0)
        for i in range(2):
            writer.submit(_write(i))
        await writer.flush()
        writer.submit(_write(2))
        await writer.flush()
        assert writer.counters == {"written": 1, "dropped": 0, "failed": 2}
        assert isinstance(writer.last_error, ConnectionError)
        await writer.close()

    asyncio.run(main())


def test_a_write_after_an_idle_spell_is_sent() -> None:
    async def main() -> None:
        run = Recorder()
        writer = WriteBehind(run, capacity=100, batch=10, linger_s=0.001)
        writer.submit(_write(0))
        await writer.flush()
        await asyncio.sleep(0.01)  # the task now sleeps with nothing to do
        writer.submit(_write(1))
        await writer.flush()
        assert [len(b) for b in run.batches] == [1, 1]
        await writer.close()

    asyncio.run(main())
