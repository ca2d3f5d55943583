"""Grouping events by identifier (`scoring.batch_features._grouped`) is the stable sort.

The feature matrix depends on the order events are grouped in; the grouping packs (key,
position) into one number when it fits, and must then give exactly numpy's stable sort of the
keys, whatever the keys (the reference).
"""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from scoring.batch_features import _grouped


@given(st.lists(st.integers(0, 50), max_size=200), st.integers(0, 5))
def test_grouping_is_the_stable_sort(keys: list[int], gap: int) -> None:
    k = np.array(keys, dtype=np.int64)
    positions = np.arange(len(keys), dtype=np.int64) * (gap + 1)  # ascending, maybe spaced
    assert _grouped(k, positions).tolist() == np.argsort(k, kind="stable").tolist()


@given(st.lists(st.integers(0, 2**62), min_size=1, max_size=50))
def test_grouping_keys_too_large_to_pack(keys: list[int]) -> None:
    """Keys near the top of int64 cannot share a number with positions: still the stable sort."""
    k = np.array(keys, dtype=np.int64)
    positions = np.arange(len(keys), dtype=np.int64)
    assert _grouped(k, positions).tolist() == np.argsort(k, kind="stable").tolist()
