"""Property tests: normalisation never raises on text, is idempotent, and keeps its invariants.

Idempotence is checked on the field's own canonical value: normalising the ``ip``, ``phone``,
``email``, ``device`` or ``account`` key again gives the same keys, derived ones (``ip_net``,
``phone_prefix``, ``email_domain``) included; a network key is itself a fixed point of its first
address. Inputs are arbitrary text (surrogates included) and generated valid values, the
latter also spelt messily to check that messy and clean spellings give one key.
"""

from __future__ import annotations

import ipaddress

import phonenumbers
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from phonenumbers import PhoneNumberFormat

from scoring.identifiers import (
    FLAGS,
    KINDS,
    Normalised,
    normalise_email,
    normalise_event,
    normalise_ip,
    normalise_opaque,
    normalise_phone,
)

SETTINGS = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
ANY_TEXT = st.text(alphabet=st.characters(exclude_categories=()), max_size=80)
REGIONS = st.sampled_from([None, "GB", "US", "DE", "FR", "JP", "IN", "BR", "AU", "IT"])


def _check_invariants(result: Normalised) -> None:
    kinds = [kind for kind, _ in result.keys]
    assert set(kinds) <= set(KINDS)
    assert kinds == sorted(kinds, key=KINDS.index)
    assert len(set(kinds)) == len(kinds)
    assert all(value and value.encode("utf-8") for _, value in result.keys)
    assert all(flag in FLAGS for flag in result.flags)


def _check_ip(raw: str) -> None:
    result = normalise_ip(raw)
    _check_invariants(result)
    ip = result.get("ip")
    if ip is not None:
        assert normalise_ip(ip).keys == result.keys
        net = result.get("ip_net")
        if net is not None:
            first = str(ipaddress.ip_network(net).network_address)
            assert normalise_ip(first).get("ip_net") == net


def _check_phone(raw: str, region: str | None) -> None:
    result = normalise_phone(raw, region)
    _check_invariants(result)
    phone = result.get("phone")
    if phone is not None:
        assert normalise_phone(phone, region).keys == result.keys
        assert normalise_phone(phone, None).keys == result.keys or not phone.startswith("+")


def _check_email(raw: str) -> None:
    result = normalise_email(raw)
    _check_invariants(result)
    email = result.get("email")
    if email is not None:
        assert normalise_email(email).keys == result.keys
        domain = result.get("email_domain")
        if domain is not None:
            assert normalise_email(f"x@{domain}").get("email_domain") == domain


def _check_opaque(kind: str, raw: str) -> None:
    result = normalise_opaque(kind, raw)
    _check_invariants(result)
    value = result.get(kind)
    if value is not None:
        assert normalise_opaque(kind, value).keys == result.keys


@SETTINGS
@given(ANY_TEXT)
def test_ip_on_arbitrary_text(raw: str) -> None:
    _check_ip(raw)


@SETTINGS
@given(ANY_TEXT, REGIONS)
def test_phone_on_arbitrary_text(raw: str, region: str | None) -> None:
    _check_phone(raw, region)


@SETTINGS
@given(st.text(alphabet="0123456789+ ()-.x#", max_size=24), REGIONS)
def test_phone_on_digit_soup(raw: str, region: str | None) -> None:
    _check_phone(raw, region)


@SETTINGS
@given(ANY_TEXT)
def test_email_on_arbitrary_text(raw: str) -> None:
    _check_email(raw)


@SETTINGS
@given(st.sampled_from(["device", "account"]), st.text(max_size=300))
def test_opaque_on_arbitrary_text(kind: str, raw: str) -> None:
    _check_opaque(kind, raw)


@SETTINGS
@given(ANY_TEXT, ANY_TEXT, ANY_TEXT, ANY_TEXT, ANY_TEXT, REGIONS)
def test_event_on_arbitrary_text(
    ip: str, device: str, phone: str, email: str, account: str, region: str | None
) -> None:
    result = normalise_event(
        ip=ip, device_id=device, phone=phone, email=email, account_id=account,
        default_region=region,
    )  # fmt: skip
    _check_invariants(result)


@SETTINGS
@given(st.ip_addresses(), st.sampled_from(["{}", " {} ", "[{}]", "[{}]:443"]))
def test_generated_addresses(
    address: ipaddress.IPv4Address | ipaddress.IPv6Address, form: str
) -> None:
    """Valid addresses, plain and decorated, give one key; IPv4 also through ::ffff:0:0/96."""
    expected = normalise_ip(str(address))
    assert expected.get("ip") is not None
    _check_ip(str(address))
    assert normalise_ip(form.format(address)) == expected
    assert normalise_ip(form.format(str(address).upper())) == expected
    if address.version == 4:
        assert normalise_ip(f"::ffff:{address}") == expected
        assert normalise_ip(f"{address}:8080") == expected


@st.composite
def _phone_numbers(draw: st.DrawFn) -> tuple[str, phonenumbers.PhoneNumber]:
    """Numbers shaped like phonenumbers' example numbers, with their last digits redrawn."""
    region = draw(st.sampled_from(sorted(phonenumbers.SUPPORTED_REGIONS)))
    example = phonenumbers.example_number(region)
    if example is None:
        example = phonenumbers.example_number("GB")
        region = "GB"
    assert example is not None
    national = phonenumbers.national_significant_number(example)
    tail = draw(st.text(alphabet="0123456789", min_size=0, max_size=min(4, len(national) - 1)))
    number = phonenumbers.parse(
        f"+{example.country_code}{national[: len(national) - len(tail)]}{tail}"
    )
    return region, number


@SETTINGS
@given(_phone_numbers())
def test_generated_numbers(drawn: tuple[str, phonenumbers.PhoneNumber]) -> None:
    """Any number, valid or not, spelt international, RFC 3966, 00-prefixed or national with
    its region, gives one phone key and one prefix."""
    region, number = drawn
    e164 = phonenumbers.format_number(number, PhoneNumberFormat.E164)
    expected = normalise_phone(e164)
    _check_phone(e164, None)
    assert expected.get("phone") == e164
    for raw in (
        phonenumbers.format_number(number, PhoneNumberFormat.INTERNATIONAL),
        phonenumbers.format_number(number, PhoneNumberFormat.RFC3966),
        "00" + e164[1:],
        " " + e164.replace("+", "+ ") + " ",
    ):
        assert normalise_phone(raw).keys == expected.keys, raw
    if phonenumbers.is_valid_number(number):
        national = phonenumbers.format_number(number, PhoneNumberFormat.NATIONAL)
        assert normalise_phone(national, region).keys == expected.keys, national


_LABEL = st.from_regex(r"[a-z0-9]([a-z0-9-]{0,10}[a-z0-9])?", fullmatch=True).filter(
    lambda label: not label.startswith("xn--")
)
_LOCAL = st.from_regex(r"[a-z0-9!#$%&'*/=?^_`{|}~-]{1,12}(\.[a-z0-9_-]{1,8}){0,2}", fullmatch=True)
_SUFFIX = st.sampled_from(["com", "co.uk", "org", "de", "ac.jp", "github.io", "example"])


@SETTINGS
@given(_LOCAL, st.lists(_LABEL, min_size=1, max_size=3), _SUFFIX, st.sampled_from(["", "+t"]))
def test_generated_addresses_email(local: str, labels: list[str], suffix: str, tag: str) -> None:
    """Valid addresses give one key however spelt: case, blanks, trailing dot, full width."""
    domain = ".".join([*labels, suffix])
    clean = normalise_email(f"{local}@{domain}")
    assert clean.get("email_domain") is not None
    _check_email(f"{local}{tag}@{domain}")
    messy = f"  {local.upper()}{tag}@{domain.upper()}. "
    assert normalise_email(messy).keys == clean.keys
    wide = "".join(chr(ord(c) + 0xFEE0) if "!" <= c <= "~" else c for c in f"{local}@{domain}")
    assert normalise_email(wide).keys == clean.keys
