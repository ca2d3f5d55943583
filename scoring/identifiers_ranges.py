"""Special-purpose IP address ranges: our own table, so results never depend on the Python version.

Transcribed from the IANA IPv4 and IPv6 Special-Purpose Address Registries (RFC 6890 as updated
by RFC 8190), plus the ranges those registries leave to other IANA registries but that can never
be a client's public address: IPv4 multicast (RFC 5771), IPv6 multicast (RFC 4291 section 2.7),
deprecated IPv6 site-local (RFC 3879) and the IPv6 space IANA lists as "Reserved by IETF" (every
address outside 2000::/3 not named elsewhere, RFC 4291 section 2.4). `ipaddress`'s own
``is_private``/``is_global`` flags are deliberately not used: they changed between CPython patch
releases (3.11.10, 3.12.4 and others).

The IPv4-mapped block ::ffff:0:0/96 and the NAT64 well-known prefix 64:ff9b::/96 are absent on
purpose: `scoring.identifiers_ip` folds them to the embedded IPv4 address before this lookup.
"""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass

import numpy as np

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address


@dataclass(frozen=True, slots=True)
class SpecialRange:
    """One special-purpose address block.

    Attributes
    ----------
    prefix
        The block in CIDR notation, e.g. ``"10.0.0.0/8"``.
    name
        Short registry name, used in the flag ``ip_special:<name>``.
    source
        Where the block is defined.
    globally_reachable
        The registry's "Globally Reachable" column; None where it says N/A. Rows from outside the
        special-purpose registries (multicast, reserved) say False: no such address can be a
        client's public unicast address.

    Examples
    --------
    >>> SpecialRange("10.0.0.0/8", "private-use", "RFC 1918", False).name
    'private-use'
    """

    prefix: str
    name: str
    source: str
    globally_reachable: bool | None


def _row(prefix: str, name: str, source: str, reachable: bool | None) -> SpecialRange:
    return SpecialRange(prefix, name, source, reachable)


SPECIAL_RANGES: tuple[SpecialRange, ...] = (
    _row("0.0.0.0/8", "this-network", "RFC 791 section 3.2", False),
    _row("0.0.0.0/32", "this-host", "RFC 1122 section 3.2.1.3", False),
    _row("10.0.0.0/8", "private-use", "RFC 1918", False),
    _row("100.64.0.0/10", "shared-address-space", "RFC 6598", False),
    _row("127.0.0.0/8", "loopback", "RFC 1122 section 3.2.1.3", False),
    _row("169.254.0.0/16", "link-local", "RFC 3927", False),
    _row("172.16.0.0/12", "private-use", "RFC 1918", False),
    _row("192.0.0.0/24", "ietf-protocol-assignments", "RFC 6890 section 2.1", False),
    _row("192.0.0.0/29", "ipv4-service-continuity", "RFC 7335", False),
    _row("192.0.0.8/32", "ipv4-dummy", "RFC 7600", False),
    _row("192.0.0.9/32", "pcp-anycast", "RFC 7723", True),
    _row("192.0.0.10/32", "turn-anycast", "RFC 8155", True),
    _row("192.0.0.170/32", "nat64-dns64-discovery", "RFC 8880, RFC 7050 section 2.2", False),
    _row("192.0.0.171/32", "nat64-dns64-discovery", "RFC 8880, RFC 7050 section 2.2", False),
    _row("192.0.2.0/24", "documentation", "RFC 5737 (TEST-NET-1)", False),
    _row("192.31.196.0/24", "as112-v4", "RFC 7535", True),
    _row("192.52.193.0/24", "amt", "RFC 7450", True),
    _row("192.88.99.0/24", "deprecated-6to4-relay-anycast", "RFC 7526", None),
    _row("192.168.0.0/16", "private-use", "RFC 1918", False),
    _row("192.175.48.0/24", "direct-delegation-as112", "RFC 7534", True),
    _row("198.18.0.0/15", "benchmarking", "RFC 2544", False),
    _row("198.51.100.0/24", "documentation", "RFC 5737 (TEST-NET-2)", False),
    _row("203.0.113.0/24", "documentation", "RFC 5737 (TEST-NET-3)", False),
    _row("224.0.0.0/4", "multicast", "RFC 5771", False),
    _row("240.0.0.0/4", "reserved", "RFC 1112 section 4", False),
    _row("255.255.255.255/32", "limited-broadcast", "RFC 8190, RFC 919 section 7", False),
    _row("::1/128", "loopback", "RFC 4291 section 2.5.3", False),
    _row("::/128", "unspecified", "RFC 4291 section 2.5.2", False),
    _row("64:ff9b:1::/48", "ipv4-ipv6-translation", "RFC 8215", False),
    _row("100::/64", "discard-only", "RFC 6666", False),
    _row("2001::/23", "ietf-protocol-assignments", "RFC 2928", False),
    _row("2001::/32", "teredo", "RFC 4380, RFC 8190", None),
    _row("2001:1::1/128", "pcp-anycast", "RFC 7723", True),
    _row("2001:1::2/128", "turn-anycast", "RFC 8155", True),
    _row("2001:1::3/128", "dns-sd-srp-anycast", "RFC 9665", True),
    _row("2001:2::/48", "benchmarking", "RFC 5180", False),
    _row("2001:3::/32", "amt", "RFC 7450", True),
    _row("2001:4:112::/48", "as112-v6", "RFC 7535", True),
    _row("2001:10::/28", "deprecated-orchid", "RFC 4843", False),
    _row("2001:20::/28", "orchid-v2", "RFC 7343", True),
    _row("2001:30::/28", "drone-remote-id", "RFC 9374", True),
    _row("2001:db8::/32", "documentation", "RFC 3849", False),
    _row("2002::/16", "6to4", "RFC 3056", None),
    _row("2620:4f:8000::/48", "direct-delegation-as112", "RFC 7534", True),
    _row("3fff::/20", "documentation", "RFC 9637", False),
    _row("5f00::/16", "segment-routing-sids", "RFC 9602", False),
    _row("fc00::/7", "unique-local", "RFC 4193, RFC 8190", False),
    _row("fe80::/10", "link-local", "RFC 4291 section 2.5.6", False),
    _row("fec0::/10", "deprecated-site-local", "RFC 3879", False),
    _row("ff00::/8", "multicast", "RFC 4291 section 2.7", False),
    _row("::/3", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("4000::/2", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("8000::/2", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("c000::/3", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("e000::/4", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("f000::/5", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("f800::/6", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
    _row("fe00::/9", "reserved-by-ietf", "IANA IPv6 Address Space; RFC 4291 section 2.4", False),
)
"""Our special-purpose table, one row per registry entry."""

# (first, last, prefix length, row) per IP version, most specific first: plain integer
# comparisons cost a fraction of `address in network`.
_Span = tuple[int, int, int, SpecialRange]


def _spans(version: int) -> tuple[_Span, ...]:
    spans = []
    for row in SPECIAL_RANGES:
        network = ipaddress.ip_network(row.prefix)
        if network.version == version:
            first, last = int(network.network_address), int(network.broadcast_address)
            spans.append((first, last, network.prefixlen, row))
    return tuple(sorted(spans, key=lambda span: -span[2]))


_SPANS = {4: _spans(4), 6: _spans(6)}
_BUCKET_BITS = {4: 8, 6: 16}
_WIDTH = {4: 32, 6: 128}


def _touched(version: int) -> frozenset[int]:
    """Leading ``_BUCKET_BITS`` values that any special-purpose range of `version` reaches."""
    shift = _WIDTH[version] - _BUCKET_BITS[version]
    return frozenset(
        bucket
        for first, last, _, _ in _SPANS[version]
        for bucket in range(first >> shift, (last >> shift) + 1)
    )


_TOUCHED = {4: _touched(4), 6: _touched(6)}


def special_ranges(address: IPAddress) -> tuple[SpecialRange, ...]:
    """Return every special-purpose row containing `address`, most specific first.

    Examples
    --------
    >>> [row.name for row in special_ranges(ipaddress.ip_address("192.0.0.9"))]
    ['pcp-anycast', 'ietf-protocol-assignments']
    >>> special_ranges(ipaddress.ip_address("11.22.33.44"))
    ()
    """
    return special_ranges_of(int(address), address.version)


def special_ranges_of(value: int, version: int) -> tuple[SpecialRange, ...]:
    """`special_ranges` of an address given as an integer and an IP version (4 or 6).

    >>> [row.name for row in special_ranges_of(0x0A000001, 4)]
    ['private-use']
    """
    if value >> (_WIDTH[version] - _BUCKET_BITS[version]) not in _TOUCHED[version]:
        return ()  # fast path: no range reaches this address's leading bits
    return tuple(row for first, last, _, row in _SPANS[version] if first <= value <= last)


def special_ipv4_mask(values: np.ndarray) -> np.ndarray:
    """Per IPv4 address given as an integer: is it in any special-purpose range?

    >>> special_ipv4_mask(np.array([0x0A000001, 0x0B16212C])).tolist()
    [True, False]
    """
    out = np.zeros(len(values), dtype=bool)
    for first, last, _, _ in _SPANS[4]:
        out |= (values >= first) & (values <= last)
    return out


def maybe_special_ipv6_mask(high: np.ndarray) -> np.ndarray:
    """Per IPv6 address given by its upper 64 bits (unsigned): may it be special-purpose?

    Exact for the ranges of 64 bits or wider; a narrower range marks every address of its /64,
    so a caller that sends the marked addresses to `special_ranges_of` loses nothing.

    >>> maybe_special_ipv6_mask(np.array([0x20010DB800000000, 0x2A00145000000000],
    ...                                  dtype=np.uint64)).tolist()
    [True, False]
    """
    out = np.zeros(len(high), dtype=bool)
    for first, last, _, _ in _SPANS[6]:
        out |= (high >= np.uint64(first >> 64)) & (high <= np.uint64(last >> 64))
    return out
