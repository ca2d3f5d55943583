"""Identifier keys of whole columns of distinct raw values, for the batch planner.

The batch path normalises each distinct raw value once (`scoring.batch_plan`). Most values take
the per-field normalisers' commonest path, which is simple enough to run on a whole Arrow column
at once: an opaque account or device id in plain printable ASCII is its own key, and a bare
canonical dotted quad outside the special-purpose ranges gives ``ip`` and its ``/24``. Those
values get their keys here, with no flags, exactly as the normalisers give them; every other
value (blanks to trim, Unicode, placeholders, ports, IPv6, special ranges...) is left to the
normalisers themselves, one at a time.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from scoring.identifiers import _PLACEHOLDERS, OPAQUE_MAX_CHARS
from scoring.identifiers_base import Normalised
from scoring.identifiers_ip import IPV4_NET_BITS
from scoring.identifiers_ranges import special_ipv4_mask

_OPAQUE_KIND = {"account_id": "account", "device_id": "device"}
# printable ASCII with no blank at either end: `str.strip` leaves it as it is
_PLAIN_TEXT = r"^[!-~](?:[ -~]*[!-~])?$"
_ZEROS = r"^[0\-]+$"  # as `identifiers._ZEROS` (a placeholder)
_DOTTED_QUAD = r"^(?:0|[1-9][0-9]{0,2})(?:\.(?:0|[1-9][0-9]{0,2})){3}$"

KeyColumns = dict[str, pa.Array]
"""Per kind: the key of each distinct raw value (null where it has none of that kind)."""


def _opaque(kind: str, values: pa.Array) -> tuple[np.ndarray, KeyColumns]:
    """`identifiers._normalise_opaque` where the value is its own key, without flags."""
    plain = pc.and_(
        pc.match_substring_regex(values, _PLAIN_TEXT),
        pc.less_equal(pc.utf8_length(values), OPAQUE_MAX_CHARS),
    )
    placeholder = pc.or_(
        pc.is_in(pc.ascii_lower(values), value_set=pa.array(sorted(_PLACEHOLDERS))),
        pc.match_substring_regex(values, _ZEROS),
    )
    fast = pc.fill_null(pc.and_(plain, pc.invert(placeholder)), False)
    return fast.to_numpy(zero_copy_only=False), {kind: values}


def _ipv4(values: pa.Array) -> tuple[np.ndarray, KeyColumns]:
    """`identifiers_ip._plain_ipv4` on a column: canonical dotted quads, not special."""
    shaped = pc.fill_null(pc.match_substring_regex(values, _DOTTED_QUAD), False)
    shaped_at = np.flatnonzero(shaped.to_numpy(zero_copy_only=False))
    fast = np.zeros(len(values), dtype=bool)
    if len(shaped_at):
        quads = values.take(pa.array(shaped_at))
        parts = pc.list_flatten(pc.split_pattern(quads, "."))
        octets = pc.cast(parts, pa.int64()).to_numpy().reshape(-1, 4)
        value = (octets[:, 0] << 24) | (octets[:, 1] << 16) | (octets[:, 2] << 8) | octets[:, 3]
        ok = np.all(octets <= 255, axis=1)
        ok[ok] = ~special_ipv4_mask(value[ok])
        fast[shaped_at[ok]] = True
    nets = pc.replace_substring_regex(values, r"\.[0-9]+$", f".0/{IPV4_NET_BITS}")
    return fast, {"ip": values, "ip_net": nets}


def column_keys(
    field: str,
    distinct: pa.Array,
    normalise: Callable[[str], Normalised],
) -> tuple[KeyColumns, list[tuple[int, Normalised]]]:
    """Keys of every distinct raw value of one field, and the others' full results.

    Returns the key columns (kinds in the order the values first give them, as a loop over
    the values would meet them) and, for the values the column path leaves alone, their
    position and what ``normalise`` gives (their flags come from there).
    """
    if field in _OPAQUE_KIND:
        fast, columns = _opaque(_OPAQUE_KIND[field], distinct)
    elif field == "ip" and IPV4_NET_BITS == 24 and len(distinct):
        fast, columns = _ipv4(distinct)
    else:
        fast, columns = np.zeros(len(distinct), dtype=bool), {}
    slow_at = np.flatnonzero(~fast)
    slow_raw = distinct.take(pa.array(slow_at, type=pa.int64())).to_pylist()
    results = [(i, normalise(raw)) for i, raw in zip(slow_at.tolist(), slow_raw, strict=True)]
    return _merged(fast, columns, results, len(distinct)), results


def _merged(
    fast: np.ndarray, columns: KeyColumns, results: list[tuple[int, Normalised]], n: int
) -> KeyColumns:
    """The fast keys with the normalisers' keys put in at the other positions."""
    slow_keys: dict[str, list[str | None]] = {}
    first: dict[str, tuple[int, int]] = {}
    for j, (i, r) in enumerate(results):
        for rank, (kind, value) in enumerate(r.keys):
            if kind not in slow_keys:
                slow_keys[kind] = [None] * len(results)
                first[kind] = (i, rank)
            slow_keys[kind][j] = value
    fast_first = np.flatnonzero(fast)
    for rank, kind in enumerate(columns):
        if len(fast_first):
            first[kind] = min(first.get(kind, (n, 0)), (int(fast_first[0]), rank))
    merged: KeyColumns = {}
    slow_mask = pa.array(~fast)
    for kind in sorted(first, key=first.__getitem__):
        base = columns.get(kind)
        if base is None or not len(fast_first):
            base = pa.nulls(n, pa.string())
        keys = slow_keys.get(kind, [None] * len(results))
        if results:
            base = pc.replace_with_mask(base, slow_mask, pa.array(keys, type=pa.string()))
        merged[kind] = base
    return merged
