"""Two measuring helpers of the benchmarks: the CPU time the hypervisor gave to other guests
(service benchmark), and the instruction count read off callgrind's report (bench_instructions).

Source for the field order of the ``cpu`` line: proc(5), ``/proc/stat``: user, nice, system,
idle, iowait, irq, softirq, steal, guest, guest_nice, in clock ticks; guest and guest_nice are
already included in user and nice (the kernel's ``account_guest_time`` adds them to both).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from loadtest.bench_instructions import COLLECTED
from loadtest.bench_processes import machine_jiffies, steal_share

STAT = (
    "cpu  44094 7 9204 66939 436 3 1755 2127 900 11\n"
    "cpu0 22000 3 4600 33000 200 1 900 1000 450 5\n"
    "intr 123 4 5\n"
)


def test_steal_is_the_eighth_field_and_the_total_leaves_guest_time_out() -> None:
    steal, total = machine_jiffies(STAT)  # type: ignore[misc]
    assert steal == 2127
    assert total == 44094 + 7 + 9204 + 66939 + 436 + 3 + 1755 + 2127  # not the 900 + 11 guest


@pytest.mark.parametrize("text", ["", "intr 1 2 3\n", "cpu 1 2 3\n", "cpu0 1 2 3 4 5 6 7 8 9\n"])
def test_a_file_without_a_full_cpu_line_gives_nothing(text: str) -> None:
    assert machine_jiffies(text) is None


def test_the_share_is_steal_over_all_time_between_two_readings() -> None:
    before = (2127, 125_000)
    after = (2127 + 329, 125_000 + 4_229)  # 21 s on two CPUs at 100 ticks/s, 329 stolen
    assert steal_share(before, after) == pytest.approx(329 / 4_229)
    assert steal_share(after, after) is None  # no time passed: no share
    assert steal_share(None, after) is None


@pytest.mark.skipif(not Path("/proc/stat").exists(), reason="no /proc/stat here")
def test_this_machine_reads() -> None:
    first = machine_jiffies()
    assert first is not None
    steal, total = first
    assert 0 <= steal <= total


def test_the_count_is_read_off_callgrind_s_closing_lines() -> None:
    """The closing lines of ``valgrind --tool=callgrind`` 3.19 (copied from a run here)."""
    stderr = (
        "==9657== \n==9657== Events    : Ir\n==9657== Collected : 417546455\n"
        "==9657== \n==9657== I   refs:      417,546,455\n"
    )
    found = COLLECTED.search(stderr)
    assert found is not None
    assert int(found.group(1)) == 417_546_455
