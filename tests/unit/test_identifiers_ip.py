"""IP normalisation against RFC 4291, RFC 5952, RFC 6052, RFC 6943 and the IANA registries.

Two conformance tables feed these tests:

- ``tests/data/identifiers_ip_cases.csv``: raw inputs, messy and clean, with the expected keys
  and flags; each row names the RFC section it checks.
- ``tests/data/identifiers_ip_special.csv``: the IANA IPv4 and IPv6 Special-Purpose Address
  Registries (RFC 6890 as updated by RFC 8190) with the other ranges we flag, transcribed by
  hand for the tests, apart from `scoring.identifiers_ranges` (entries from memory of the
  registries as of 2025, section numbers only where certain). Membership is computed here with
  ``ipaddress.ip_network`` containment, independently of the integer spans the code uses.
"""

from __future__ import annotations

import ast
import csv
import ipaddress
import random
import re
from pathlib import Path

import pytest

from scoring import identifiers_ip, identifiers_ranges
from scoring.identifiers import clear_caches, normalise_ip
from scoring.identifiers_ranges import SPECIAL_RANGES

DATA = Path(__file__).parent.parent / "data"


def _unescape(text: str) -> str:
    """Turn ``\\u{9}``-style escapes in table cells into the characters they name."""
    return re.sub(r"\\u\{([0-9a-fA-F]+)\}", lambda m: chr(int(m.group(1), 16)), text)


def _rows(name: str) -> list[dict[str, str]]:
    with (DATA / name).open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


CASES = _rows("identifiers_ip_cases.csv")
REGISTRY = _rows("identifiers_ip_special.csv")
FLAGGED = [row for row in REGISTRY if row["handling"] == "flag"]
FOLDED = [row for row in REGISTRY if row["handling"] == "fold"]
NETWORKS = [(ipaddress.ip_network(row["prefix"]), row) for row in FLAGGED]


def _expected_names(address: ipaddress.IPv4Address | ipaddress.IPv6Address) -> set[str]:
    return {row["name"] for network, row in NETWORKS if address in network}


def _expected_not_global(address: ipaddress.IPv4Address | ipaddress.IPv6Address) -> bool:
    """The most specific containing registry row decides (the 192.0.0.0/24 footnote)."""
    rows = [(network.prefixlen, row) for network, row in NETWORKS if address in network]
    if not rows:
        return False
    return max(rows, key=lambda item: item[0])[1]["globally_reachable"] == "false"


def _special_names(flags: frozenset[str]) -> set[str]:
    return {flag.split(":", 1)[1] for flag in flags if flag.startswith("ip_special:")}


@pytest.mark.parametrize("row", CASES, ids=[f"{i}:{r['raw']!r}" for i, r in enumerate(CASES)])
def test_conformance_case(row: dict[str, str]) -> None:
    """Each row: raw input gives the expected keys and exactly the expected flags."""
    result = normalise_ip(_unescape(row["raw"]))
    assert result.get("ip") == (row["ip"] or None), row["source"]
    assert result.get("ip_net") == (row["ip_net"] or None), row["source"]
    assert result.flags == frozenset(row["flags"].split()), row["source"]


def test_our_table_matches_the_registry_transcription() -> None:
    """Our table holds exactly the flagged rows of the transcription, reachability included."""
    ours = {(r.prefix, r.name, r.globally_reachable) for r in SPECIAL_RANGES}
    reachable = {"true": True, "false": False, "": None}
    expected = {(r["prefix"], r["name"], reachable[r["globally_reachable"]]) for r in FLAGGED}
    assert ours == expected


def _address(version: int, value: int) -> ipaddress.IPv4Address | ipaddress.IPv6Address:
    return ipaddress.IPv6Address(value) if version == 6 else ipaddress.IPv4Address(value)


def _edges(network: ipaddress.IPv4Network | ipaddress.IPv6Network) -> list[int]:
    first, last = int(network.network_address), int(network.broadcast_address)
    top = (1 << network.max_prefixlen) - 1
    return [value for value in (first - 1, first, last, last + 1) if 0 <= value <= top]


@pytest.mark.parametrize("row", FLAGGED, ids=[r["prefix"] for r in FLAGGED])
def test_registry_range_edges(row: dict[str, str]) -> None:
    """First and last address of each range carry its name; just outside, the table decides.

    Source: the row's own citation (IANA special-purpose registries, RFC 6890 and others).
    """
    network = ipaddress.ip_network(row["prefix"])
    for value in _edges(network):
        address = _address(network.version, value)
        if address.version == 6 and (address.ipv4_mapped or int(address) >> 32 == 0x64FF9B << 64):
            continue  # folded to IPv4: covered by test_folded_prefixes
        result = normalise_ip(str(address))
        names = _expected_names(address)
        assert _special_names(result.flags) == names, (row["source"], str(address))
        assert ("ip_special" in result.flags) == bool(names)
        assert ("ip_not_global" in result.flags) == _expected_not_global(address)
        assert (result.get("ip_net") is None) == bool(names), "no ip_net for special addresses"
        if int(network.network_address) <= value <= int(network.broadcast_address):
            assert row["name"] in names


@pytest.mark.parametrize("row", FOLDED, ids=[r["prefix"] for r in FOLDED])
def test_folded_prefixes(row: dict[str, str]) -> None:
    """IPv4-mapped (RFC 4291 section 2.5.5.2) and NAT64 well-known (RFC 6052 section 2.1)
    addresses fold to the embedded IPv4 address, at both ends of the range."""
    network = ipaddress.ip_network(row["prefix"])
    for address in (network.network_address, network.broadcast_address, network[0x0B16212C]):
        embedded = ipaddress.IPv4Address(int(address) & 0xFFFFFFFF)
        assert normalise_ip(str(address)) == normalise_ip(str(embedded)), row["source"]


def _random_global_ipv6(rng: random.Random) -> ipaddress.IPv6Address:
    while True:
        address = ipaddress.IPv6Address((1 << 125) | rng.getrandbits(125))  # in 2000::/3
        if not _expected_names(address):
            return address


def test_ipv6_net_is_the_64_bit_interface_identifier_boundary() -> None:
    """``ip_net`` of an IPv6 address is its /64, as ``ipaddress.ip_network(f"{a}/64",
    strict=False)`` computes it: RFC 4291 section 2.5.1 (64-bit interface identifiers)."""
    rng = random.Random(4291)
    for _ in range(500):
        address = _random_global_ipv6(rng)
        expected = ipaddress.ip_network(f"{address}/64", strict=False)
        assert normalise_ip(str(address)).get("ip_net") == str(expected)


def test_ipv4_net_is_the_24() -> None:
    """``ip_net`` of an IPv4 address is its /24 (common practice, no source), checked against
    ``ipaddress.ip_network(f"{a}/24", strict=False)``."""
    rng = random.Random(24)
    checked = 0
    while checked < 500:
        address = ipaddress.IPv4Address(rng.getrandbits(32))
        if _expected_names(address):
            continue
        expected = ipaddress.ip_network(f"{address}/24", strict=False)
        assert normalise_ip(str(address)).get("ip_net") == str(expected)
        checked += 1


# Addresses whose ``is_private``/``is_global`` answers differ between CPython patch releases
# (gh-113171, fixed in 3.11.10, 3.12.4 and 3.13; from memory): 3.11.7, for one, calls 3fff::1
# and 5f00::1 global and 2001:3::1 (AMT) not global. Our answers come from the registry alone.
VERSION_SENSITIVE = [
    ("192.0.0.9", {"pcp-anycast", "ietf-protocol-assignments"}, False),
    ("192.0.0.10", {"turn-anycast", "ietf-protocol-assignments"}, False),
    ("64:ff9b:1::1", {"ipv4-ipv6-translation", "reserved-by-ietf"}, True),
    ("2001:2::1", {"benchmarking", "ietf-protocol-assignments"}, True),
    ("2001:3::1", {"amt", "ietf-protocol-assignments"}, False),
    ("2001:4:112::1", {"as112-v6", "ietf-protocol-assignments"}, False),
    ("2001:20::1", {"orchid-v2", "ietf-protocol-assignments"}, False),
    ("2002::1", {"6to4"}, False),
    ("3fff::1", {"documentation"}, True),
    ("5f00::1", {"segment-routing-sids", "reserved-by-ietf"}, True),
]


@pytest.mark.parametrize(("raw", "names", "not_global"), VERSION_SENSITIVE)
def test_answers_where_python_versions_disagree(
    raw: str, names: set[str], not_global: bool
) -> None:
    """Pins our registry-based answers (IANA special-purpose registries, RFC 6890/8190)."""
    result = normalise_ip(raw)
    assert _special_names(result.flags) == names
    assert ("ip_not_global" in result.flags) == not_global


_ADDRESS_FLAGS = (
    "is_private",
    "is_global",
    "is_reserved",
    "is_link_local",
    "is_loopback",
    "is_multicast",
    "is_unspecified",
    "is_site_local",
)


def _explode(self: object) -> bool:
    raise AssertionError("normalisation consulted an ipaddress classification flag")


def test_table_does_not_depend_on_ipaddress_flags(monkeypatch: pytest.MonkeyPatch) -> None:
    """With every ipaddress classification property made to fail, results are unchanged.

    Fault injection: the properties are replaced for this test only, and the caches are
    cleared before and after so that no result computed here outlives it.
    """
    samples = [row["raw"] for row in CASES] + [raw for raw, _, _ in VERSION_SENSITIVE]
    samples += [str(network.network_address) for network, _ in NETWORKS]
    clear_caches()
    before = [normalise_ip(_unescape(raw)) for raw in samples]
    clear_caches()
    for cls in (ipaddress.IPv4Address, ipaddress.IPv6Address):
        for name in _ADDRESS_FLAGS:
            if hasattr(cls, name):
                monkeypatch.setattr(cls, name, property(_explode))
    try:
        after = [normalise_ip(_unescape(raw)) for raw in samples]
    finally:
        clear_caches()
    assert after == before


def test_source_never_names_ipaddress_flags() -> None:
    """A static guard beside the fault-injection test above: no attribute access by name."""
    for module in (identifiers_ip, identifiers_ranges):
        tree = ast.parse(Path(module.__file__ or "").read_text(encoding="utf-8"))
        used = {node.attr for node in ast.walk(tree) if isinstance(node, ast.Attribute)}
        assert not used & set(_ADDRESS_FLAGS), module.__name__
