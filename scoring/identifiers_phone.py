"""Phone number normalisation to E.164 with `phonenumbers`.

Decisions, each documented where it is made:

- Cleaning: an RFC 3966 ``tel:`` scheme is dropped; an extension at the end (``ext 12``,
  ``ext. 12``, ``extension 12``, ``x12``, ``#12``, ``;ext=12``) is dropped and flagged
  ``phone_extension``, because the line, not the desk, is the identifier; spaces, dots, dashes,
  slashes and parentheses are visual separators (RFC 3966 section 5.1.1) and are removed.
- A leading ``00`` means ``+`` (00 is the international prefix ITU-T E.164 recommends; from
  memory), whatever `default_region` is. Without ``+``/``00`` the number is national: it is
  read in `default_region` when one is given; otherwise it gets ``phone_no_country`` and a
  best-effort key of its bare digits (no ``+``), as no country can be told.
- Text that is not a number at all (letters other than an extension marker, other symbols, or
  no digit) gets ``phone_invalid`` and no key.
- A number with more than 15 digits (country code included) is invalid (ITU-T E.164 section
  6.1), and so is one `phonenumbers` does not know as valid. Invalid numbers still give a
  ``phone`` key, ``+`` then the digits, and a ``phone_prefix`` key when the country code is
  known.
- ``phone_prefix`` is ``+``, the country code and the national destination code
  (`phonenumbers.length_of_national_destination_code`) for a valid number; where there is no
  NDC, and for every invalid number, the first `FALLBACK_PREFIX_DIGITS` (3) national digits
  instead (our choice: most NDCs have 2 to 4 digits).
- The number type is a flag where `phonenumbers` knows it (``phone_mobile``, ``phone_voip``...):
  VoIP numbers are cheap to obtain in bulk (common practice, no source).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

import phonenumbers
from phonenumbers import PhoneMetadata, PhoneNumberType
from phonenumbers.phonenumberutil import (
    _MAX_LENGTH_FOR_NSN,
    _MIN_LENGTH_FOR_NSN,
    NON_DIGITS_PATTERN,
    ValidationResult,
    _extract_country_code,
    _maybe_strip_national_prefix_carrier_code,
    _number_type_helper,
    _set_italian_leading_zeros_for_phone_number,
    _test_number_length,
)
from phonenumbers.re_util import re_compile

from scoring.identifiers_base import (
    CACHE_ENTRIES,
    CACHE_MAX_CHARS,
    EMPTY,
    Normalised,
    flag_set,
    fold_width,
    require_text,
)

MAX_E164_DIGITS = 15
"""Most digits in an international number, country code included (ITU-T E.164 section 6.1)."""

FALLBACK_PREFIX_DIGITS = 3
"""National digits kept in ``phone_prefix`` when there is no national destination code."""

REGIONS: frozenset[str] = frozenset(phonenumbers.SUPPORTED_REGIONS)
"""Region codes accepted as `default_region` (ISO 3166-1 alpha-2 codes known to phonenumbers)."""

_MAX_TEXT_CHARS = 64
_EXTENSION = re.compile(r"(?:;ext=|ext(?:ension)?\.?|x|#)\s*[0-9]{1,10}\s*#?$", re.IGNORECASE)
_SEPARATORS = re.compile(r"[\s.\-/()\[\]\u2010-\u2015\u2212]")
_DIGITS = re.compile(r"[0-9]+")
_TYPE_FLAGS: dict[int, str] = {
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
_INVALID = Normalised((), flag_set(["phone_invalid"]))
_NON_DIGITS = re.compile(NON_DIGITS_PATTERN)
NON_GEO_REGION: str = phonenumbers.REGION_CODE_FOR_NON_GEO_ENTITY
UNKNOWN: int = PhoneNumberType.UNKNOWN
MOBILE: int = PhoneNumberType.MOBILE

# phonenumbers looks up each metadata pattern through `re.compile` on every use (a dozen and more
# per number), and the `re` module's own cache costs more per lookup than a dictionary. The
# library's pattern cache keeps the compiled patterns instead: bounded by the patterns of its
# metadata, and the same patterns, so the same results.
if hasattr(phonenumbers, "enable_pattern_cache"):  # where the installed release offers it
    phonenumbers.enable_pattern_cache()


@dataclass(frozen=True, slots=True)
class _Dialled:
    digits: str
    international: bool
    extension: bool


def _dialled(text: str) -> _Dialled | None:
    """Split cleaned text into its digits; None when the text is not a number."""
    if text[:4].lower() == "tel:":
        text = text[4:]
    match = _EXTENSION.search(text)
    body = text[: match.start()] if match else text
    body = _SEPARATORS.sub("", body)
    international = body.startswith("+")
    if international:
        body = body[1:]
    elif body.startswith("00"):
        body, international = body[2:], True
    if len(body) > _MAX_TEXT_CHARS or _DIGITS.fullmatch(body) is None:
        return None
    return _Dialled(body, international, match is not None)


def _leading_country_code(digits: str) -> int | None:
    """Return the country code that `digits` start with (codes are prefix-free), or None."""
    if digits.startswith("0"):
        return None
    for length in (1, 2, 3):
        code = int(digits[:length] or "0")
        if code in phonenumbers.COUNTRY_CODE_TO_REGION_CODE:
            return code
    return None


def _parse(text: str, region: str | None) -> phonenumbers.PhoneNumber | None:
    try:
        return phonenumbers.parse(text, region)
    except phonenumbers.NumberParseException:
        return None


_NOT_STRIPPABLE = (
    ValidationResult.TOO_SHORT,
    ValidationResult.IS_POSSIBLE_LOCAL_ONLY,
    ValidationResult.INVALID_LENGTH,
)


def _parse_international(digits: str) -> phonenumbers.PhoneNumber | None:
    """`phonenumbers.parse("+" + digits)` for a string of ASCII digits, without its generic
    text handling (extraction, RFC 3966, alpha characters, extensions: all already done here).

    The steps are the library's own for a number written with "+": the country code, then the
    national prefix stripped when what remains still has a possible length, then the leading
    zeros. Anything unusual goes to the library's parser itself; the tests compare both on every
    example number and on perturbed ones.
    """
    if not 3 <= len(digits) <= 20:
        return _parse(f"+{digits}", None)
    country_code, national = _extract_country_code(digits)
    if country_code == 0 or len(national) < _MIN_LENGTH_FOR_NSN:
        return _parse(f"+{digits}", None)
    region = phonenumbers.region_code_for_country_code(country_code)
    metadata = PhoneMetadata.metadata_for_region_or_calling_code(country_code, region)
    if metadata is not None:
        _, potential, _ = _maybe_strip_national_prefix_carrier_code(national, metadata)
        if _test_number_length(potential, metadata) not in _NOT_STRIPPABLE:
            national = potential
    if not _MIN_LENGTH_FOR_NSN <= len(national) <= _MAX_LENGTH_FOR_NSN:
        return _parse(f"+{digits}", None)
    number = phonenumbers.PhoneNumber(country_code=country_code)
    _set_italian_leading_zeros_for_phone_number(national, number)
    number.national_number = int(national)
    return number


def _prefix(country_code: int, national: str, ndc_digits: int) -> tuple[str, str]:
    digits = ndc_digits if ndc_digits > 0 else FALLBACK_PREFIX_DIGITS
    return ("phone_prefix", f"+{country_code}{national[:digits]}")


def _region_and_type(number: phonenumbers.PhoneNumber, nsn: str) -> tuple[str | None, int]:
    """`phonenumbers.region_code_for_number` and `number_type` in one pass.

    The library computes the type up to three times per number (validity, type, and again
    inside `length_of_national_destination_code`); this follows the same steps once, reusing
    the type when the region itself was found by matching the number's type. The tests check
    the results against the library's own functions on every example number it ships.
    """
    country_code = number.country_code or 0
    regions = phonenumbers.COUNTRY_CODE_TO_REGION_CODE.get(country_code)
    if regions is None:
        return None, UNKNOWN
    found: str | None = None
    known_type: int | None = None
    if len(regions) == 1:
        found = regions[0]
    else:
        for region in regions:
            metadata = PhoneMetadata.metadata_for_region(region.upper(), None)
            if metadata is None:
                continue
            if metadata.leading_digits is not None:
                if re_compile(metadata.leading_digits).match(nsn):
                    found = region
                    break
                continue
            candidate = int(_number_type_helper(nsn, metadata))
            if candidate != UNKNOWN:
                found, known_type = region, candidate
                break
    if found is None:
        return None, UNKNOWN
    metadata = PhoneMetadata.metadata_for_region_or_calling_code(country_code, found)
    if metadata is None:
        return found, UNKNOWN
    if known_type is None:
        known_type = int(_number_type_helper(nsn, metadata))
    return found, known_type


def _valid(number: phonenumbers.PhoneNumber, region: str | None, ntype: int) -> bool:
    """`phonenumbers.is_valid_number`, given the region and type already found."""
    if region is None or ntype == UNKNOWN:
        return False
    country_code = number.country_code or 0
    metadata = PhoneMetadata.metadata_for_region_or_calling_code(country_code, region)
    if metadata is None:
        return False
    return region == NON_GEO_REGION or (
        country_code == phonenumbers.country_code_for_valid_region(region)
    )


def _ndc_length(number: phonenumbers.PhoneNumber, ntype: int) -> int:
    """`phonenumbers.length_of_national_destination_code`, given the type already found."""
    if number.extension is not None:
        return int(phonenumbers.length_of_national_destination_code(number))
    text = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.INTERNATIONAL)
    groups = _NON_DIGITS.split(text)
    if len(groups) <= 3:
        return 0
    if ntype == MOBILE and phonenumbers.country_mobile_token(number.country_code or 0):
        return len(groups[2]) + len(groups[3])
    return len(groups[2])


def _from_number(number: phonenumbers.PhoneNumber, flags: list[str]) -> Normalised:
    """Keys and flags of a number that `phonenumbers` parsed."""
    national = phonenumbers.national_significant_number(number)
    country_code = number.country_code or 0
    e164 = f"+{country_code}{national}"  # the E.164 format: "+", country code, NSN
    region, ntype = _region_and_type(number, national)
    valid = len(e164) - 1 <= MAX_E164_DIGITS and _valid(number, region, ntype)
    if valid:
        ndc_digits = _ndc_length(number, ntype)
        type_flag = _TYPE_FLAGS.get(ntype)
        flags.extend([type_flag] if type_flag else [])
    else:
        ndc_digits = 0
        flags.append("phone_invalid")
    keys = (("phone", e164), _prefix(country_code, national, ndc_digits))
    return Normalised(keys, flag_set(flags))


def _unparsed(digits: str, country_code: int | None, flags: list[str]) -> Normalised:
    """Best-effort keys of a number `phonenumbers` could not parse: ``+`` then its digits."""
    flags.append("phone_invalid")
    if country_code is None:
        return Normalised((("phone", f"+{digits}"),), flag_set(flags))
    national = digits[len(str(country_code)) :]
    keys = (("phone", f"+{digits}"), _prefix(country_code, national, 0))
    return Normalised(keys, flag_set(flags))


def _normalise_phone(raw: str, region: str | None) -> Normalised:
    text = fold_width(raw)
    if not text:
        return EMPTY
    dialled = _dialled(text)
    if dialled is None:
        return _INVALID
    flags = ["phone_extension"] if dialled.extension else []
    digits = dialled.digits
    if dialled.international:
        number = _parse_international(digits)
        if number is not None:
            return _from_number(number, flags)
        return _unparsed(digits, _leading_country_code(digits), flags)
    if region is None:
        flags.append("phone_no_country")
        flags.extend(["phone_invalid"] if len(digits) > MAX_E164_DIGITS else [])
        return Normalised((("phone", digits),), flag_set(flags))
    number = _parse(digits, region)
    if number is not None:
        return _from_number(number, flags)
    country_code = phonenumbers.country_code_for_region(region)
    return _unparsed(f"{country_code}{digits}", country_code, flags)


_cached_phone = lru_cache(maxsize=CACHE_ENTRIES)(_normalise_phone)


def check_region(region: str) -> str:
    """Return `region` as an upper-case region code known to phonenumbers, or raise ValueError.

    Examples
    --------
    >>> check_region("gb")
    'GB'
    >>> check_region("UK")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    ValueError: default_region 'UK' is not a region code known to phonenumbers: use ... 'GB'...
    """
    upper = region.upper()
    if upper not in REGIONS:
        raise ValueError(
            f"default_region {region!r} is not a region code known to phonenumbers: "
            "use an ISO 3166-1 alpha-2 code such as 'GB', 'US' or 'DE'"
        )
    return upper


def normalise_phone(raw: str | None, default_region: str | None = None) -> Normalised:
    """Normalise a raw phone field into ``phone`` (E.164) and ``phone_prefix`` keys with flags.

    Never raises on text: garbage is flagged ``phone_invalid``; None, empty or blank text gives
    no keys and no flags. Results are cached on (raw value, region) in a least-recently-used
    cache of `CACHE_ENTRIES` = 2**17 entries (values longer than 512 characters bypass it), as
    `phonenumbers` costs tens of microseconds per number. See the module docstring for each
    rule.

    Parameters
    ----------
    raw
        The phone field as received, e.g. ``"0044 (0)20 7946 0321"``.
    default_region
        Region code used for numbers written without ``+`` or ``00``; None flags them
        ``phone_no_country`` instead.

    Returns
    -------
    Normalised
        Keys ``phone`` and ``phone_prefix``; flags among ``phone_invalid``,
        ``phone_no_country``, ``phone_extension`` and one number-type flag such as
        ``phone_mobile``.

    Raises
    ------
    TypeError
        If `raw` or `default_region` is neither a str nor None.
    ValueError
        If `default_region` is not a region code known to phonenumbers.

    Examples
    --------
    >>> result = normalise_phone("020 7946 0321", default_region="GB")
    >>> result.keys
    (('phone', '+442079460321'), ('phone_prefix', '+4420'))
    >>> result.flags
    frozenset({'phone_fixed'})
    >>> normalise_phone("0044 20 7946 0321 ext. 12").get("phone")
    '+442079460321'
    >>> sorted(normalise_phone("020 7946 0321").flags)
    ['phone_no_country']
    """
    if raw is None:
        return EMPTY
    require_text("phone", raw)
    if default_region is not None and default_region not in REGIONS:
        require_text("default_region", default_region)
        default_region = check_region(default_region)
    if len(raw) > CACHE_MAX_CHARS:
        return _normalise_phone(raw, default_region)
    return _cached_phone(raw, default_region)
