"""Phone normalisation against ITU-T E.164, RFC 3966 and the `phonenumbers` reference library.

The conformance table ``tests/data/identifiers_phone_cases.csv`` holds invented numbers, most
from ranges that numbering authorities keep for drama and fiction (Ofcom, NANPA, ACMA; the
ranges are quoted from memory), each row naming its source.
"""

from __future__ import annotations

import csv
import re
from pathlib import Path

import phonenumbers
import pytest
from phonenumbers import PhoneNumberFormat, PhoneNumberType

from scoring.identifiers import normalise_phone
from scoring.identifiers_phone import FALLBACK_PREFIX_DIGITS, MAX_E164_DIGITS

DATA = Path(__file__).parent.parent / "data"
E164 = re.compile(r"\+[1-9][0-9]{1,14}")  # ITU-T E.164 section 6.1: at most 15 digits


def _rows(name: str) -> list[dict[str, str]]:
    with (DATA / name).open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


CASES = _rows("identifiers_phone_cases.csv")


@pytest.mark.parametrize("row", CASES, ids=[f"{i}:{r['raw']!r}" for i, r in enumerate(CASES)])
def test_conformance_case(row: dict[str, str]) -> None:
    """Each row: raw input and region give the expected keys and exactly the expected flags."""
    result = normalise_phone(row["raw"], row["region"] or None)
    assert result.get("phone") == (row["phone"] or None), row["source"]
    assert result.get("phone_prefix") == (row["phone_prefix"] or None), row["source"]
    assert result.flags == frozenset(row["flags"].split()), row["source"]


VALID = [row for row in CASES if row["phone"] and "phone_invalid" not in row["flags"].split()]
VALID = [row for row in VALID if row["phone"].startswith("+")]


@pytest.mark.parametrize("row", VALID, ids=[r["phone"] for r in VALID])
def test_table_prefixes_agree_with_phonenumbers(row: dict[str, str]) -> None:
    """The hand-written prefix equals ``+``, the country code and the NDC as phonenumbers'
    ``length_of_national_destination_code`` splits the number (or the fixed-digit rule where
    it finds no NDC), and the key is E.164 (ITU-T E.164 section 6.1)."""
    number = phonenumbers.parse(row["phone"], None)
    national = phonenumbers.national_significant_number(number)
    ndc_digits = phonenumbers.length_of_national_destination_code(number)
    digits = ndc_digits or FALLBACK_PREFIX_DIGITS
    assert row["phone_prefix"] == f"+{number.country_code}{national[:digits]}", row["source"]
    assert E164.fullmatch(row["phone"])
    assert phonenumbers.format_number(number, PhoneNumberFormat.E164) == row["phone"]


def _example_numbers() -> list[tuple[str, phonenumbers.PhoneNumber]]:
    """phonenumbers' own example numbers, every region and every type it has one for."""
    numbers = []
    for region in sorted(phonenumbers.SUPPORTED_REGIONS):
        for number_type in (PhoneNumberType.FIXED_LINE, PhoneNumberType.MOBILE):
            number = phonenumbers.example_number_for_type(region, number_type)
            if number is not None:
                numbers.append((region, number))
    return numbers


EXAMPLES = _example_numbers()


@pytest.mark.parametrize(("region", "number"), EXAMPLES, ids=[r for r, _ in EXAMPLES])
def test_every_written_form_gives_the_e164_key(
    region: str, number: phonenumbers.PhoneNumber
) -> None:
    """International, national (with its region), RFC 3966 and E.164 spellings of one number,
    as phonenumbers formats them, give one key: its E.164 form; the prefix is the country code
    and NDC by ``length_of_national_destination_code``, or the fixed-digit rule without one."""
    e164 = phonenumbers.format_number(number, PhoneNumberFormat.E164)
    national = phonenumbers.national_significant_number(number)
    digits = phonenumbers.length_of_national_destination_code(number) or FALLBACK_PREFIX_DIGITS
    forms = [
        (e164, None),
        (phonenumbers.format_number(number, PhoneNumberFormat.INTERNATIONAL), None),
        (phonenumbers.format_number(number, PhoneNumberFormat.RFC3966), None),
        (phonenumbers.format_number(number, PhoneNumberFormat.NATIONAL), region),
        ("00" + e164[1:], None),
    ]
    for raw, default_region in forms:
        result = normalise_phone(raw, default_region)
        assert result.get("phone") == e164, raw
        assert result.get("phone_prefix") == f"+{number.country_code}{national[:digits]}", raw
        assert "phone_invalid" not in result.flags, raw


@pytest.mark.parametrize("length", range(12, 19))
def test_at_most_15_digits(length: int) -> None:
    """ITU-T E.164 section 6.1: an international number has at most 15 digits, country code
    included; longer ones are flagged invalid but still keyed."""
    digits = ("44207946" + "0" * 20)[:length]
    result = normalise_phone(f"+{digits}")
    assert result.get("phone") == f"+{digits}"
    if length > MAX_E164_DIGITS:
        assert "phone_invalid" in result.flags


TYPE_FLAGS = {
    PhoneNumberType.FIXED_LINE: "phone_fixed",
    PhoneNumberType.MOBILE: "phone_mobile",
    PhoneNumberType.FIXED_LINE_OR_MOBILE: "phone_fixed_or_mobile",
    PhoneNumberType.TOLL_FREE: "phone_toll_free",
    PhoneNumberType.PREMIUM_RATE: "phone_premium",
    PhoneNumberType.SHARED_COST: "phone_shared_cost",
    PhoneNumberType.VOIP: "phone_voip",
    PhoneNumberType.PERSONAL_NUMBER: "phone_personal",
    PhoneNumberType.PAGER: "phone_pager",
    PhoneNumberType.UAN: "phone_uan",
    PhoneNumberType.VOICEMAIL: "phone_voicemail",
}


def test_number_type_flags_follow_phonenumbers() -> None:
    """A valid number carries the flag of the type phonenumbers gives it, for the example
    number of every region and type in phonenumbers' metadata (VoIP included)."""
    seen = set()
    for region in sorted(phonenumbers.SUPPORTED_REGIONS):
        for requested in TYPE_FLAGS:
            number = phonenumbers.example_number_for_type(region, requested)
            if number is None or not phonenumbers.is_valid_number(number):
                continue
            flag = TYPE_FLAGS[phonenumbers.number_type(number)]
            e164 = phonenumbers.format_number(number, PhoneNumberFormat.E164)
            flags = normalise_phone(e164).flags
            assert flag in flags, e164
            assert len(flags & set(TYPE_FLAGS.values())) == 1, e164
            seen.add(flag)
    assert seen == set(TYPE_FLAGS.values())


def test_invalid_number_keeps_keys() -> None:
    """Invalid numbers are flagged, not dropped: a key and, with a country code, a prefix."""
    result = normalise_phone("+44 12")
    assert result.keys == (("phone", "+4412"), ("phone_prefix", "+4412"))
    assert result.flags == frozenset({"phone_invalid"})


def test_unknown_region_is_a_clear_error() -> None:
    with pytest.raises(ValueError, match=r"default_region 'UK' is not a region code.*'GB'"):
        normalise_phone("020 7946 0321", default_region="UK")


def test_non_text_is_a_type_error() -> None:
    with pytest.raises(TypeError, match="phone must be a str or None, got int"):
        normalise_phone(442079460321)  # type: ignore[arg-type]
    with pytest.raises(TypeError, match="default_region must be a str or None, got int"):
        normalise_phone("+442079460321", default_region=44)  # type: ignore[arg-type]
