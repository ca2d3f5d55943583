"""Invented networks for the demo scenario: ISPs, mobile carriers, hosting providers, a campus.

Every block is drawn at random from ordinary unicast space and checked against the IANA
special-purpose registries, so no generated address is private, shared (RFC 6598), documentation,
loopback, multicast or otherwise reserved. The addresses look public; they are made up, and any
resemblance to a real network's allocation is chance.

Addresses travel as integers: IPv4 as one 32-bit value, IPv6 as two 64-bit halves (`hi` is the
/64 prefix, `lo` the interface identifier, RFC 4291 section 2.5.1). `format_addresses` turns them
into canonical text at the end.
"""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass

import numpy as np

# IANA IPv4 Special-Purpose Address Registry (RFC 6890 and the RFCs named per row), plus the
# multicast block (RFC 5771). Written from memory of the registry; tests check against their own
# table.
SPECIAL_V4 = (
    "0.0.0.0/8", "10.0.0.0/8", "100.64.0.0/10", "127.0.0.0/8", "169.254.0.0/16",
    "172.16.0.0/12", "192.0.0.0/24", "192.0.2.0/24", "192.31.196.0/24", "192.52.193.0/24",
    "192.88.99.0/24", "192.168.0.0/16", "192.175.48.0/24", "198.18.0.0/15", "198.51.100.0/24",
    "203.0.113.0/24", "224.0.0.0/4", "240.0.0.0/4", "255.255.255.255/32",
)  # fmt: skip
# IANA IPv6 Special-Purpose Address Registry entries inside 2000::/3, the only space we draw from
# (RFC 4291 section 2.4: global unicast). From memory of the registry.
SPECIAL_V6 = (
    "2001::/23", "2001:db8::/32", "2002::/16", "2620:4f:8000::/48", "3fff::/20",
)  # fmt: skip
# First octets holding any special-purpose block are skipped whole: simpler than carving around.
_SAFE_FIRST_OCTETS = np.array(
    [o for o in range(1, 224) if o not in (10, 100, 127, 169, 172, 192, 198, 203)]
)
# Top 12 bits of the regional registries' IPv6 blocks (2400::/12, 2600::/12, 2800::/12,
# 2a00::/12, 2c00::/12), from memory of the IANA IPv6 unicast assignments.
_V6_TOP12 = np.array([0x240, 0x260, 0x280, 0x2A0, 0x2C0], dtype=np.uint64)

_MASK64 = np.uint64(0xFFFFFFFFFFFFFFFF)


def mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser (Steele, Lea, Flood, OOPSLA 2014): a stable hash of 64-bit integers."""
    z = np.asarray(x, dtype=np.uint64) + np.uint64(0x9E3779B97F4A7C15)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return np.asarray(z ^ (z >> np.uint64(31)), dtype=np.uint64)


def _overlaps_special(net: ipaddress.IPv4Network | ipaddress.IPv6Network) -> bool:
    table = SPECIAL_V4 if net.version == 4 else SPECIAL_V6
    return any(net.overlaps(ipaddress.ip_network(s)) for s in table)


class AddressSpace:
    """Hands out non-overlapping IPv4 /16 blocks and IPv6 /32 prefixes, none special-purpose."""

    def __init__(self, rng: np.random.Generator) -> None:
        self._rng = rng
        self._v4_used: set[int] = set()
        self._v6_used: set[int] = set()

    def v4_block16(self) -> int:
        """Base address (as an integer) of a fresh /16."""
        while True:
            first = int(self._rng.choice(_SAFE_FIRST_OCTETS))
            base = (first << 24) | (int(self._rng.integers(0, 256)) << 16)
            net = ipaddress.IPv4Network((base, 16))
            if base not in self._v4_used and not _overlaps_special(net):
                self._v4_used.add(base)
                return base

    def v4_block24s(self, n: int) -> np.ndarray:
        """Bases of `n` distinct /24s inside one fresh /16 (one provider's range)."""
        base = self.v4_block16()
        thirds = self._rng.choice(256, size=n, replace=False)
        return (base + thirds.astype(np.int64) * 256).astype(np.uint64)

    def v6_prefix32(self) -> int:
        """A fresh /32 as the top 32 bits of the address (an ISP's allocation)."""
        while True:
            top = int(self._rng.choice(_V6_TOP12))
            prefix = (top << 20) | int(self._rng.integers(0, 1 << 20))
            net = ipaddress.IPv6Network((prefix << 96, 32))
            if prefix not in self._v6_used and not _overlaps_special(net):
                self._v6_used.add(prefix)
                return prefix


def hosts_in_24(bases: np.ndarray, draw: np.ndarray) -> np.ndarray:
    """Host addresses .1 to .254 of /24 bases picked by `draw` (any non-negative integers)."""
    draw = np.asarray(draw, dtype=np.uint64)
    base = bases[(draw % np.uint64(len(bases))).astype(np.int64)]
    host = (draw // np.uint64(len(bases))) % np.uint64(254) + np.uint64(1)
    return np.asarray(base + host, dtype=np.uint64)


def hosts_in_16(bases: np.ndarray, draw: np.ndarray) -> np.ndarray:
    """Host addresses of /16 bases picked by `draw`, never ending in .0 or .255."""
    draw = np.asarray(draw, dtype=np.uint64)
    base = bases[(draw % np.uint64(len(bases))).astype(np.int64)]
    rest = draw // np.uint64(len(bases))
    third = rest % np.uint64(256)
    fourth = (rest // np.uint64(256)) % np.uint64(254) + np.uint64(1)
    return np.asarray(base + third * np.uint64(256) + fourth, dtype=np.uint64)


@dataclass
class Networks:
    """The invented network world shared by benign users and attackers."""

    isp_v4: list[np.ndarray]  # per ISP: /16 bases
    isp_v6: np.ndarray  # per ISP: /32 prefix (top 32 bits), 0 where the ISP has no IPv6
    carrier_pools: list[np.ndarray]  # per carrier: /24 bases
    hosting: np.ndarray  # one /24 base per hosting provider
    campus_nat: np.ndarray  # the campus network's few NAT addresses, all in one /24
    vpn_exits: np.ndarray  # a commercial VPN's exit addresses, in some hosting networks

    @classmethod
    def build(cls, rng: np.random.Generator, scale: float, n_isps: int = 14) -> Networks:
        space = AddressSpace(rng)
        sizes = rng.integers(1, 6, size=n_isps)
        isp_v4 = [np.array([space.v4_block16() for _ in range(k)], dtype=np.uint64) for k in sizes]
        has_v6 = rng.random(n_isps) < 0.6
        isp_v6 = np.array([space.v6_prefix32() if h else 0 for h in has_v6], dtype=np.uint64)
        pool = max(4, round(6 * scale**0.5))
        carriers = [space.v4_block24s(int(rng.integers(pool, 2 * pool))) for _ in range(4)]
        hosting = np.concatenate([space.v4_block24s(1) for _ in range(8)])
        campus = space.v4_block24s(1)
        campus_nat = hosts_in_24(campus, rng.choice(254, size=4, replace=False))
        # The VPN's exits sit in hosting networks 0, 3 and 4 (10 each).
        exits = [hosts_in_24(hosting[[h]], rng.choice(254, 10, replace=False)) for h in (0, 3, 4)]
        return cls(isp_v4, isp_v6, carriers, hosting, campus_nat, np.concatenate(exits))


def format_addresses(ver: np.ndarray, hi: np.ndarray, lo: np.ndarray) -> list[str | None]:
    """Canonical text per address (RFC 5952 for IPv6, via `ipaddress`); None where `ver` is 0."""
    out = np.full(len(ver), None, dtype=object)
    v4 = np.flatnonzero(ver == 4)
    uniq, inverse = np.unique(lo[v4], return_inverse=True)
    text = [f"{x >> 24}.{(x >> 16) & 255}.{(x >> 8) & 255}.{x & 255}" for x in uniq.tolist()]
    out[v4] = np.array(text, dtype=object)[inverse]
    v6 = np.flatnonzero(ver == 6)
    pairs = {(h, low) for h, low in zip(hi[v6].tolist(), lo[v6].tolist(), strict=True)}
    names = {pair: str(ipaddress.IPv6Address((pair[0] << 64) | pair[1])) for pair in pairs}
    out[v6] = np.array(
        [names[pair] for pair in zip(hi[v6].tolist(), lo[v6].tolist(), strict=True)], dtype=object
    )
    return list(out)
