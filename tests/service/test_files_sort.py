"""sort_events: by time, ties in input order, checked against Python's stable `sorted`."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.files import sort_events
from service.tables import EventTable


def events_at(times: list[float]) -> EventTable:
    n = len(times)
    ids = [f"e{i}" for i in range(n)]
    return EventTable(
        event_id=ids,
        ts_s=np.array(times, dtype=np.float64),
        type=["login"] * n,
        account_id=[f"a{i}" for i in range(n)],
        ip=[None] * n,
        device_id=[f"d{i}" if i % 2 else None for i in range(n)],
        phone=[None] * n,
        email=[f"u{i}@example.com" for i in range(n)],
        amount=np.arange(n, dtype=np.float64),
        current_decision=["allow"] * n,
        line=np.arange(2, n + 2),
    )


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from([5.0, 1.0, 3.5, 3.5, 2.0, 1e9]), max_size=40))
def test_sorted_by_time_ties_in_input_order(times: list[float]) -> None:
    """Reference: Python's `sorted` is guaranteed stable (Python docs, "Sorting Techniques")."""
    table = events_at(times)
    expected = sorted(range(len(times)), key=lambda i: times[i])
    out = sort_events(table)
    assert out.event_id == [f"e{i}" for i in expected]
    assert out.ts_s.tolist() == [times[i] for i in expected]
    assert out.device_id == [table.device_id[i] for i in expected]
    assert out.email == [table.email[i] for i in expected]
    assert out.amount.tolist() == [float(i) for i in expected]
    assert out.line.tolist() == [i + 2 for i in expected]


def test_sorted_input_comes_back_as_is() -> None:
    table = events_at([1.0, 1.0, 2.0])
    assert sort_events(table) is table


def test_sorting_leaves_the_input_alone() -> None:
    table = events_at([3.0, 1.0, 2.0])
    sort_events(table)
    assert table.event_id == ["e0", "e1", "e2"]
    assert table.ts_s.tolist() == [3.0, 1.0, 2.0]
