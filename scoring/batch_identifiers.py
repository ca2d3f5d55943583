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
from scoring.identifiers_email import (
    MAX_ADDRESS_CHARS,
    MAX_LOCAL_OCTETS,
    DomainInfo,
    domain_info,
)
from scoring.identifiers_ip import _V6_FLAGS, IPV4_NET_BITS, IPV6_NET_BITS
from scoring.identifiers_ranges import maybe_special_ipv6_mask, special_ipv4_mask

_OPAQUE_KIND = {"account_id": "account", "device_id": "device"}
# printable ASCII with no blank at either end: `str.strip` leaves it as it is
_PLAIN_TEXT = r"^[!-~](?:[ -~]*[!-~])?$"
_ZEROS = r"^[0\-]+$"  # as `identifiers._ZEROS` (a placeholder)
_DOTTED_QUAD = r"^(?:0|[1-9][0-9]{0,2})(?:\.(?:0|[1-9][0-9]{0,2})){3}$"
_PLAIN_EMAIL = r"^[a-z0-9_-]+(?:\.[a-z0-9_-]+)*@[a-z0-9.-]+$"
_PLAIN_IPV6 = r"^[23][0-9a-f]{3}(?::[1-9a-f][0-9a-f]{0,3}){7}$"

Flags = frozenset[str]
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


def _ipv4(values: pa.Array) -> np.ndarray:
    """Where `identifiers_ip._plain_ipv4` gives its keys: canonical dotted quads, not special."""
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
    return fast


def _hex_groups(groups: pa.Array) -> np.ndarray:
    """Values of 1 to 4 lower-case hexadecimal digits (already checked), as integers."""
    padded = pc.utf8_lpad(groups, width=4, padding="0")
    if isinstance(padded, pa.ChunkedArray):
        padded = padded.combine_chunks()
    offsets = np.frombuffer(padded.buffers()[1], dtype=np.int32)
    offsets = offsets[padded.offset : padded.offset + len(padded) + 1]
    data = np.frombuffer(padded.buffers()[2], dtype=np.uint8)
    chars = data[offsets[0] : offsets[-1]].reshape(-1, 4)
    digits = _HEX_DIGIT[chars].astype(np.uint64)
    out: np.ndarray = (
        (digits[:, 0] << 12) | (digits[:, 1] << 8) | (digits[:, 2] << 4) | digits[:, 3]
    )
    return out


def _ipv6(values: pa.Array) -> np.ndarray:
    """Where `identifiers_ip._plain_ipv6` gives the text itself as the key: eight groups in
    2000::/3, lower case, no leading zeros and no zero group (so nothing for RFC 5952 to
    shorten), outside the special-purpose ranges."""
    shaped = pc.fill_null(pc.match_substring_regex(values, _PLAIN_IPV6), False)
    shaped_at = np.flatnonzero(shaped.to_numpy(zero_copy_only=False))
    fast = np.zeros(len(values), dtype=bool)
    if len(shaped_at):
        groups = pc.list_flatten(pc.split_pattern(values.take(pa.array(shaped_at)), ":"))
        words = _hex_groups(groups).reshape(-1, 8)
        high = (words[:, 0] << 48) | (words[:, 1] << 32) | (words[:, 2] << 16) | words[:, 3]
        fast[shaped_at[~maybe_special_ipv6_mask(high)]] = True
    return fast


_HEX_DIGIT = np.zeros(256, dtype=np.uint8)
_HEX_DIGIT[np.frombuffer(b"0123456789abcdef", dtype=np.uint8)] = np.arange(16, dtype=np.uint8)


def _ip(values: pa.Array) -> tuple[np.ndarray, KeyColumns, list[tuple[np.ndarray, Flags]]]:
    """IPv4 and IPv6 values the column path takes, their keys, and the IPv6 flag."""
    fast4, fast6 = _ipv4(values), np.zeros(len(values), dtype=bool)
    if IPV6_NET_BITS == 64:
        fast6 = _ipv6(values)
    nets4 = pc.replace_substring_regex(values, r"\.[0-9]+$", f".0/{IPV4_NET_BITS}")
    nets6 = pc.replace_substring_regex(values, r"^((?:[0-9a-f]+:){3}[0-9a-f]+):.*$", r"\1::/64")
    nets = pc.if_else(pa.array(fast6), nets6, nets4)
    return fast4 | fast6, {"ip": values, "ip_net": nets}, [(np.flatnonzero(fast6), _V6_FLAGS)]


def _email(values: pa.Array) -> tuple[np.ndarray, KeyColumns, list[tuple[np.ndarray, Flags]]]:
    """Where `identifiers_email._normalise_email` gives the text itself as the ``email`` key:
    lower-case ASCII with one ``@``, a dot-atom local part of letters, digits, ``_`` and ``-``
    (no subaddress to drop) of at most 64 characters, and a domain already in the ASCII form
    `domain_info` gives (asked once per distinct domain)."""
    shaped = pc.and_(
        pc.match_substring_regex(values, _PLAIN_EMAIL),
        pc.less_equal(pc.utf8_length(values), MAX_ADDRESS_CHARS),
    )
    shaped = pc.and_(shaped, pc.less_equal(pc.find_substring(values, "@"), MAX_LOCAL_OCTETS))
    shaped_at = np.flatnonzero(pc.fill_null(shaped, False).to_numpy(zero_copy_only=False))
    n = len(values)
    code = np.full(n, -1, dtype=np.int64)  # per value: its domain's number, -1 if not taken
    infos: list[DomainInfo | None] = []
    if len(shaped_at):
        domains = pc.replace_substring_regex(values.take(pa.array(shaped_at)), "^.*@", "")
        encoded = domains.dictionary_encode()
        names = encoded.dictionary.to_pylist()
        infos = [domain_info(d) for d in names]
        same = [i is not None and i.ascii == d for i, d in zip(infos, names, strict=True)]
        usable = np.array([*same, False])
        of_row = encoded.indices.to_numpy(zero_copy_only=False).astype(np.int64)
        code[shaped_at] = np.where(usable[of_row], of_row, -1)
    fast = code >= 0
    registrable = [None if i is None else i.registrable for i in infos] + [None]
    columns = {
        "email": values,
        "email_domain": pa.array(registrable, type=pa.string()).take(
            pa.array(np.where(fast, code, len(registrable) - 1))
        ),
    }
    by_flags: dict[Flags, list[int]] = {}
    for c, info in enumerate(infos):
        if info is not None and info.flags:
            by_flags.setdefault(info.flags, []).append(c)
    flags = [(np.flatnonzero(np.isin(code, c)), f) for f, c in by_flags.items()]
    return fast, columns, flags


def column_keys(
    field: str,
    distinct: pa.Array,
    normalise: Callable[[str], Normalised],
) -> tuple[KeyColumns, list[tuple[int, Normalised]], list[tuple[np.ndarray, Flags]]]:
    """Keys of every distinct raw value of one field, and the others' full results.

    Returns the key columns (kinds in the order the values first give them, as a loop over
    the values would meet them); for the values the column path leaves alone, their position
    and what ``normalise`` gives (their flags come from there); and the flags of the values the
    column path takes, as (positions, flags) pairs.

    >>> from scoring.identifiers import field_normaliser
    >>> raw = pa.array(["11.22.33.44", " 11.22.33.44", "10.0.0.1"])
    >>> keys, left, flags = column_keys("ip", raw, field_normaliser("ip"))
    >>> keys["ip_net"].to_pylist(), [i for i, _ in left]  # blanks and a private address left
    (['11.22.33.0/24', '11.22.33.0/24', None], [1, 2])
    """
    fast_flags: list[tuple[np.ndarray, Flags]] = []
    if field in _OPAQUE_KIND:
        fast, columns = _opaque(_OPAQUE_KIND[field], distinct)
    elif field == "ip" and IPV4_NET_BITS == 24 and len(distinct):
        fast, columns, fast_flags = _ip(distinct)
    elif field == "email" and len(distinct):
        fast, columns, fast_flags = _email(distinct)
    else:
        fast, columns = np.zeros(len(distinct), dtype=bool), {}
    slow_at = np.flatnonzero(~fast)
    slow_raw = distinct.take(pa.array(slow_at, type=pa.int64())).to_pylist()
    results = [(i, normalise(raw)) for i, raw in zip(slow_at.tolist(), slow_raw, strict=True)]
    return _merged(fast, columns, results, len(distinct)), results, fast_flags


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
