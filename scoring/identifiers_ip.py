"""IP address normalisation: canonical text, a network key and special-purpose flags.

Decisions, each documented where it is made:

- Accepted decorations: surrounding whitespace; brackets ``[2001:db8::1]`` and ``[v6]:port``
  (RFC 3986 section 3.2.2); an IPv4 ``:port`` suffix (an IPv6 address without brackets has no
  port, as its last group could be one); an IPv6 zone ``%eth0`` (RFC 4007 section 11), dropped
  because it names an interface of the host that logged it, not the client.
- Rejected as ``ip_invalid`` (no keys): anything `ipaddress` does not parse, IPv4 octets with
  leading zeros (read as octal by some parsers, RFC 6943 section 3.1.1), integer and shortened
  IPv4 forms, prefix lengths, lists such as ``"a, b"``, a zone on an IPv4 address, a bad port.
- IPv4-mapped addresses (::ffff:0:0/96, RFC 4291 section 2.5.5.2) and the NAT64 well-known
  prefix (64:ff9b::/96, RFC 6052 section 2.1) fold to the embedded IPv4 address: it is the same
  client. Other embeddings (6to4, Teredo, local NAT64 prefixes) are flagged, not folded.
- ``ip_net`` is the /24 of an IPv4 address (common practice, no source) and the /64 of an IPv6
  address (RFC 4291 section 2.5.1: a 64-bit interface identifier, so the /64 is one link).
- Special-purpose addresses (our table in `scoring.identifiers_ranges`) still get an ``ip`` key,
  flagged ``ip_special`` plus ``ip_special:<name>`` for every row that contains them, and
  ``ip_not_global`` when the most specific row says not globally reachable. They get no
  ``ip_net`` key: thousands of unrelated networks reuse 192.168.1.0/24 or fe80::/64, so their
  network says nothing about who holds the address.
"""

from __future__ import annotations

import ipaddress
import re
import socket
from functools import lru_cache

from scoring.identifiers_base import (
    CACHE_ENTRIES,
    CACHE_MAX_CHARS,
    EMPTY,
    Normalised,
    flag_set,
    fold_width,
    require_text,
)
from scoring.identifiers_ranges import IPAddress, special_ranges, special_ranges_of

IPV4_NET_BITS = 24
"""Prefix length of an IPv4 ``ip_net`` key."""

IPV6_NET_BITS = 64
"""Prefix length of an IPv6 ``ip_net`` key (RFC 4291 section 2.5.1)."""

_MAX_TEXT_CHARS = 128  # the longest bracketed IPv6 text with a zone and a port is far shorter
_PORT = re.compile(r"[0-9]{1,5}")
_NAT64_PREFIX = int(ipaddress.IPv6Address("64:ff9b::"))
_LOW_32_BITS = (1 << 32) - 1
_ALL_128_BITS = (1 << 128) - 1
_INVALID = Normalised((), flag_set(["ip_invalid"]))


def _valid_port(port: str) -> bool:
    return _PORT.fullmatch(port) is not None and int(port) <= 65535


def _strip_zone(host: str) -> tuple[str, bool] | None:
    """Split ``fe80::1%eth0`` into the address and whether it had a (non-empty) zone."""
    address, sep, zone = host.partition("%")
    if sep and not zone:
        return None
    return address, bool(sep)


def _bare_address(text: str) -> tuple[str, bool] | None:
    """Remove brackets, a port and a zone: (address text, had a zone), or None if malformed."""
    if text.startswith("["):
        host, closed, rest = text[1:].partition("]")
        if not closed or (rest and not (rest[0] == ":" and _valid_port(rest[1:]))):
            return None
        return _strip_zone(host)
    if text.count(":") == 1:  # IPv4 with a port: an IPv6 address has at least two colons
        host, _, port = text.partition(":")
        return (host, False) if _valid_port(port) else None
    return _strip_zone(text)


def _fold_embedded_ipv4(address: IPAddress) -> IPAddress:
    """Return the IPv4 address inside an IPv4-mapped or NAT64 well-known-prefix address."""
    if isinstance(address, ipaddress.IPv4Address):
        return address
    value = int(address)
    if value >> 32 == 0xFFFF or value & ~_LOW_32_BITS == _NAT64_PREFIX:
        return ipaddress.IPv4Address(value & _LOW_32_BITS)
    return address


def parse_ip(raw: str) -> IPAddress | None:
    """Parse a raw IP field to an address, after folding; None when it is not an address.

    Examples
    --------
    >>> parse_ip(" [::FFFF:192.0.2.7]:443 ")
    IPv4Address('192.0.2.7')
    >>> parse_ip("010.0.0.1") is None
    True
    """
    text = fold_width(raw)
    bare = _bare_address(text) if len(text) <= _MAX_TEXT_CHARS else None
    if bare is None:
        return None
    host, had_zone = bare
    try:
        address = ipaddress.ip_address(host)
    except ValueError:
        return None
    if had_zone and address.version == 4:
        return None
    return _fold_embedded_ipv4(address)


def network_text(address: IPAddress) -> str:
    """Return the ``ip_net`` value of `address`: its /24 (IPv4) or /64 (IPv6) in CIDR text.

    Examples
    --------
    >>> network_text(ipaddress.ip_address("11.22.33.44"))
    '11.22.33.0/24'
    >>> network_text(ipaddress.ip_address("2001:db8:1:2:3:4:5:6"))
    '2001:db8:1:2::/64'
    """
    if isinstance(address, ipaddress.IPv4Address):
        mask = (_LOW_32_BITS << (32 - IPV4_NET_BITS)) & _LOW_32_BITS
        value = int(address) & mask  # dotted quad written directly: same text, faster
        return f"{value >> 24}.{value >> 16 & 255}.{value >> 8 & 255}.{value & 255}/{IPV4_NET_BITS}"
    mask = (_ALL_128_BITS << (128 - IPV6_NET_BITS)) & _ALL_128_BITS
    return f"{ipaddress.IPv6Address(int(address) & mask)}/{IPV6_NET_BITS}"


NO_FLAGS = flag_set([])
_V6_FLAGS = flag_set(["ip_v6"])
_DOTTED_QUAD = re.compile(r"(?:0|[1-9][0-9]{0,2})(?:\.(?:0|[1-9][0-9]{0,2})){3}")


def _plain_ipv4(raw: str) -> Normalised | None:
    """Fast path for the commonest input, a bare canonical dotted quad; None for anything else.

    Gives exactly what the general path gives (the tests compare both on every case), without
    building `ipaddress` objects.
    """
    text = raw.strip()
    if not text.isascii() or _DOTTED_QUAD.fullmatch(text) is None:
        return None
    a, b, c, d = (int(part) for part in text.split("."))
    if a > 255 or b > 255 or c > 255 or d > 255:
        return None
    value = a << 24 | b << 16 | c << 8 | d
    rows = special_ranges_of(value, 4)
    if rows:
        return None  # rare: let the general path build the flags
    return Normalised((("ip", text), ("ip_net", f"{a}.{b}.{c}.0/{IPV4_NET_BITS}")), NO_FLAGS)


_HEX_COLON = re.compile(r"[0-9A-Fa-f:]{2,39}")
_GLOBAL_UNICAST_TOP = 0b001  # 2000::/3


def _plain_ipv6(raw: str) -> Normalised | None:
    """Fast path for a bare IPv6 address in global unicast space; None for anything else.

    The C library's ``inet_pton``/``inet_ntop`` parse and print the same RFC 4291 text and
    RFC 5952 canonical form as `ipaddress` for plain hexadecimal addresses (no zone, no
    embedded dotted quad, no brackets); the tests compare both paths on many spellings.
    """
    text = raw.strip()
    if _HEX_COLON.fullmatch(text) is None:
        return None
    try:
        packed = socket.inet_pton(socket.AF_INET6, text)
    except (OSError, ValueError):
        return None
    value = int.from_bytes(packed, "big")
    if value >> 125 != _GLOBAL_UNICAST_TOP or special_ranges_of(value, 6):
        return None
    canonical = socket.inet_ntop(socket.AF_INET6, packed)
    network = socket.inet_ntop(socket.AF_INET6, packed[:8] + bytes(8))
    keys = (("ip", canonical), ("ip_net", f"{network}/{IPV6_NET_BITS}"))
    return Normalised(keys, _V6_FLAGS)


def _normalise_ip(raw: str) -> Normalised:
    if IPV4_NET_BITS == 24:
        fast = _plain_ipv4(raw)
        if fast is not None:
            return fast
    if IPV6_NET_BITS == 64 and ":" in raw:
        fast = _plain_ipv6(raw)
        if fast is not None:
            return fast
    address = parse_ip(raw)
    if address is None:
        return _INVALID if fold_width(raw) else EMPTY
    text = str(address)  # RFC 5952 section 4 canonical text for IPv6
    flags = ["ip_v6"] if address.version == 6 else []
    rows = special_ranges(address)
    if not rows:
        return Normalised((("ip", text), ("ip_net", network_text(address))), flag_set(flags))
    flags.append("ip_special")
    flags.extend(f"ip_special:{row.name}" for row in rows)
    if rows[0].globally_reachable is False:
        flags.append("ip_not_global")
    return Normalised((("ip", text),), flag_set(flags))


_cached_ip = lru_cache(maxsize=CACHE_ENTRIES)(_normalise_ip)


def normalise_ip(raw: str | None) -> Normalised:
    """Normalise a raw IP field into ``ip`` and ``ip_net`` keys with flags.

    Never raises on text: garbage gives the flag ``ip_invalid`` and no keys; None, empty or
    blank text gives no keys and no flags. Results are cached on the raw value (a
    least-recently-used cache of `CACHE_ENTRIES` = 2**17 entries; values longer than 512
    characters bypass it). See the module docstring for each rule.

    Parameters
    ----------
    raw
        The IP field as received, e.g. ``" 203.0.113.9:8443 "`` or ``"[2001:db8::1]"``.

    Returns
    -------
    Normalised
        Keys ``ip`` (canonical text) and ``ip_net`` (not for special-purpose addresses);
        flags among ``ip_invalid``, ``ip_v6``, ``ip_special``, ``ip_special:<name>``,
        ``ip_not_global``.

    Raises
    ------
    TypeError
        If `raw` is neither a str nor None.

    Examples
    --------
    >>> normalise_ip("11.22.33.44:8080").keys
    (('ip', '11.22.33.44'), ('ip_net', '11.22.33.0/24'))
    >>> sorted(normalise_ip("::ffff:10.1.2.3").flags)
    ['ip_not_global', 'ip_special', 'ip_special:private-use']
    >>> normalise_ip("not an address").flags
    frozenset({'ip_invalid'})
    """
    if raw is None:
        return EMPTY
    require_text("ip", raw)
    if len(raw) > CACHE_MAX_CHARS:
        return _normalise_ip(raw)
    return _cached_ip(raw)
