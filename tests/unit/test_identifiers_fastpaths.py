"""The normalisers' fast paths give exactly what the general paths give.

The fast paths (a bare dotted quad, a bare global-unicast IPv6 address, and one pass over
`phonenumbers` metadata instead of three) exist only for speed; these tests pin that they never
change a result. References: `ipaddress` of the standard library (RFC 4291 text forms, RFC 5952
canonical text), and the `phonenumbers` library's own public functions.
"""

from __future__ import annotations

import ipaddress
import random

import phonenumbers
import pytest
from hypothesis import given
from hypothesis import strategies as st
from phonenumbers import PhoneNumberType

from scoring import identifiers_ip as ipmod
from scoring import identifiers_phone as phonemod


def _general_ip(raw: str) -> tuple[tuple[tuple[str, str], ...], frozenset[str]] | None:
    address = ipmod.parse_ip(raw)
    if address is None:
        return None
    return ((("ip", str(address)), ("ip_net", ipmod.network_text(address))), frozenset())


@given(st.integers(0, 2**32 - 1))
def test_ipv4_fast_path_matches_ipaddress(value: int) -> None:
    text = str(ipaddress.IPv4Address(value))
    fast = ipmod._plain_ipv4(text)
    if fast is None:  # special-purpose addresses take the general path
        assert ipmod.special_ranges_of(value, 4)
        return
    assert (fast.keys, fast.flags) == _general_ip(text)


@pytest.mark.parametrize(
    "text", ["01.2.3.4", "1.2.3.256", "1.2.3", "1.2.3.4.5", "1.2.3.4:80", "１.2.3.4", " 8.8.8.8 "]
)
def test_ipv4_fast_path_declines_or_agrees(text: str) -> None:
    fast = ipmod._plain_ipv4(text)
    if fast is not None:
        assert (fast.keys, fast.flags) == _general_ip(text)


def _spellings(value: int) -> list[str]:
    """Several RFC 4291 section 2.2 spellings of one address: full, leading zeros, compressed."""
    groups = [(value >> (112 - 16 * i)) & 0xFFFF for i in range(8)]
    full = ":".join(f"{g:04x}" for g in groups)
    bare = ":".join(f"{g:x}" for g in groups)
    upper = full.upper()
    return [full, bare, upper, str(ipaddress.IPv6Address(value))]


@given(st.integers(0, 2**125 - 1), st.lists(st.integers(0, 7), max_size=4))
def test_ipv6_fast_path_matches_ipaddress(low: int, zero_groups: list[int]) -> None:
    value = (0b001 << 125) | low
    for g in zero_groups:  # runs of zeros exercise "::" compression (RFC 5952 section 4.2)
        value &= ~(0xFFFF << (112 - 16 * g))
    for text in _spellings(value):
        fast = ipmod._plain_ipv6(text)
        if fast is None:
            assert ipmod.special_ranges_of(value, 6)
            continue
        address = ipaddress.ip_address(text)
        expected = (("ip", str(address)), ("ip_net", ipmod.network_text(address)))
        assert fast.keys == expected
        assert fast.flags == frozenset({"ip_v6"})


@pytest.mark.parametrize(
    "text",
    ["1::2::3", "2001:db8::g", "12345::", "::ffff:1.2.3.4", "fe80::1%eth0", "[2001:4860::1]", ":"],
)
def test_ipv6_fast_path_declines_what_it_does_not_know(text: str) -> None:
    assert ipmod._plain_ipv6(text) is None


def _example_numbers() -> list[phonenumbers.PhoneNumber]:
    """Every example number `phonenumbers` ships, for every region and number type."""
    out = []
    for region in sorted(phonenumbers.SUPPORTED_REGIONS):
        for kind in PhoneNumberType.values():
            number = phonenumbers.example_number_for_type(region, kind)
            if number is not None:
                out.append(number)
    return out


EXAMPLES = _example_numbers()


def test_single_pass_matches_library_on_every_example_number() -> None:
    """Region, type, validity and NDC length equal the library's public functions."""
    rng = random.Random(5)
    numbers = list(EXAMPLES)
    for number in EXAMPLES[:400]:  # perturbed digits give invalid and other-region numbers too
        digits = str(number.national_number)
        i = rng.randrange(len(digits))
        mutated = digits[:i] + str(rng.randrange(10)) + digits[i + 1 :]
        numbers.append(
            phonenumbers.PhoneNumber(country_code=number.country_code, national_number=int(mutated))
        )
    assert len(numbers) > 1000
    for number in numbers:
        nsn = phonenumbers.national_significant_number(number)
        region, ntype = phonemod._region_and_type(number, nsn)
        assert region == phonenumbers.region_code_for_number(number)
        assert ntype == phonenumbers.number_type(number)
        valid = phonemod._valid(number, region, ntype)
        assert valid == phonenumbers.is_valid_number(number)
        if valid:
            assert phonemod._ndc_length(number, ntype) == (
                phonenumbers.length_of_national_destination_code(number)
            )


def _international_inputs() -> list[str]:
    """Digit strings after "+": every example number, the same with a national prefix or a
    stray zero after the country code, and perturbed digits and lengths (ITU-T E.164 allows at
    most 15 digits; longer and shorter strings must behave as the library does too)."""
    rng = random.Random(11)
    out = []
    for number in EXAMPLES:
        cc, nsn = str(number.country_code), phonenumbers.national_significant_number(number)
        out += [cc + nsn, cc + "0" + nsn, cc + "00" + nsn, cc + nsn[:-1], cc + nsn + "7"]
        digits = list(cc + nsn)
        digits[rng.randrange(len(digits))] = str(rng.randrange(10))
        out.append("".join(digits))
    out += [
        "".join(rng.choice("0123456789") for _ in range(n)) for n in range(1, 22) for _ in range(40)
    ]
    return out


def test_international_parse_matches_library() -> None:
    """`phonenumbers.parse("+" + digits)` is the reference, exception or number."""
    inputs = _international_inputs()
    assert len(inputs) > 5000
    for digits in inputs:
        try:
            expected = phonenumbers.parse("+" + digits, None)
        except phonenumbers.NumberParseException:
            expected = None
        assert phonemod._parse_international(digits) == expected, digits
