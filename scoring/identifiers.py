"""Identifier normalisation: raw event fields to ``(kind, canonical value)`` keys plus flags.

Every event carries raw identifier fields (``ip``, ``device_id``, ``phone``, ``email``,
``account_id``), any of which may be None or empty. `normalise_event` turns them into keys, one
per kind in `KINDS`, and flags that describe the raw values. The rules of each field are in the
docstrings of `scoring.identifiers_ip`, `scoring.identifiers_phone` and
`scoring.identifiers_email`; device and account identifiers are opaque (`normalise_opaque`).

Shared rules:

- Text is NFKC-normalised (Unicode UAX #15) and trimmed before anything else, so full-width
  digits, full-width ``＠`` and the like fold to their ASCII forms.
- Nothing raises on text: garbage is flagged (``ip_invalid``, ``phone_invalid``...), never an
  exception. Absent, empty or blank fields give no keys and no flags. A non-str argument
  raises TypeError.
- Keys are fixed points: normalising a key's value again gives the same key.
- Each per-field normaliser caches its results on the raw value (least-recently-used, 2**17
  entries each, values over 512 characters bypass the caches), so a repeated value costs a
  dictionary lookup; `clear_caches` empties them.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from functools import lru_cache, partial

from scoring.identifiers_base import (
    CACHE_ENTRIES,
    CACHE_MAX_CHARS,
    EMPTY,
    KINDS,
    Normalised,
    flag_set,
    fold_width,
    require_text,
    utf8_safe,
)
from scoring.identifiers_email import (
    _cached_email,
    _normalise_email,
    domain_info,
    normalise_email,
)
from scoring.identifiers_ip import _cached_ip, _normalise_ip, normalise_ip
from scoring.identifiers_phone import (
    _cached_phone,
    _normalise_phone,
    check_region,
    normalise_phone,
)
from scoring.identifiers_ranges import SPECIAL_RANGES

__all__ = [
    "CACHE_ENTRIES",
    "FLAGS",
    "KINDS",
    "OPAQUE_MAX_CHARS",
    "Normalised",
    "cache_info",
    "clear_caches",
    "field_normaliser",
    "normalise_email",
    "normalise_event",
    "normalise_ip",
    "normalise_opaque",
    "normalise_phone",
]

OPAQUE_MAX_CHARS = 256
"""Longest device or account identifier kept whole; longer ones are truncated and flagged."""

OPAQUE_KINDS = ("account", "device")
"""Kinds whose values are opaque strings."""

_PLACEHOLDERS = frozenset(
    {"null", "none", "nil", "undefined", "unknown", "nan", "n/a", "na", "(null)", "[]", "{}"}
)
_ZEROS = re.compile(r"[0\-]+")  # "0", "-" and the all-zero UUID that some platforms send
_FOLD_ROUNDS = 4

FLAGS: frozenset[str] = frozenset(
    {
        *(f"{kind}_{flag}" for kind in OPAQUE_KINDS for flag in ("invalid", "placeholder")),
        *(f"{kind}_truncated" for kind in OPAQUE_KINDS),
        *("ip_invalid", "ip_v6", "ip_special", "ip_not_global"),
        *(f"ip_special:{row.name}" for row in SPECIAL_RANGES),
        *("phone_invalid", "phone_no_country", "phone_extension", "phone_fixed"),
        *("phone_mobile", "phone_fixed_or_mobile", "phone_toll_free", "phone_premium"),
        *("phone_shared_cost", "phone_voip", "phone_personal", "phone_pager", "phone_uan"),
        *("phone_voicemail", "email_invalid", "email_subaddress", "email_disposable"),
        "email_unknown_tld",
    }
)
"""Every flag any normaliser can set."""


def _truncate(text: str) -> str:
    # Cutting can leave trailing blanks or text NFKC changes, so cut until the result is a
    # fixed point: then normalising the key again gives the key.
    for _ in range(_FOLD_ROUNDS):
        text = fold_width(text[:OPAQUE_MAX_CHARS])
        if len(text) <= OPAQUE_MAX_CHARS:
            break
    return text


def _normalise_opaque(kind: str, raw: str) -> Normalised:
    # ASCII text is already in NFKC form (and is valid UTF-8): only the trimming remains
    text = raw.strip() if raw.isascii() else fold_width(raw)
    if not text:
        return EMPTY
    if text.lower() in _PLACEHOLDERS or _ZEROS.fullmatch(text):
        return Normalised((), flag_set([f"{kind}_placeholder"]))
    if not utf8_safe(text):
        return Normalised((), flag_set([f"{kind}_invalid"]))
    if len(text) <= OPAQUE_MAX_CHARS:
        return Normalised(((kind, text),))
    return Normalised(((kind, _truncate(text)),), flag_set([f"{kind}_truncated"]))


_cached_opaque = lru_cache(maxsize=CACHE_ENTRIES)(_normalise_opaque)


def normalise_opaque(kind: str, raw: str | None) -> Normalised:
    """Normalise an opaque device or account identifier.

    The value is NFKC-normalised and trimmed, and keeps its case. Values longer than
    `OPAQUE_MAX_CHARS` (256) characters are truncated and flagged ``<kind>_truncated``.
    Placeholders that buggy clients send instead of an identifier ("null", "undefined",
    "unknown", "0", the all-zero UUID...) would join unrelated users under one key, so they give
    no key and the flag ``<kind>_placeholder`` (common practice, no source). Text that cannot
    be encoded as UTF-8 (lone surrogates) gives no key and ``<kind>_invalid``. Cached on
    (kind, raw value): a least-recently-used cache of 2**17 entries.

    Parameters
    ----------
    kind
        ``"device"`` or ``"account"``.
    raw
        The field as received.

    Raises
    ------
    ValueError
        If `kind` is not an opaque kind.
    TypeError
        If `raw` is neither a str nor None.

    Examples
    --------
    >>> normalise_opaque("device", "  Dev-42 ").keys
    (('device', 'Dev-42'),)
    >>> normalise_opaque("account", "undefined").flags
    frozenset({'account_placeholder'})
    """
    if kind not in OPAQUE_KINDS:
        raise ValueError(f"kind must be one of {OPAQUE_KINDS}, got {kind!r}")
    if raw is None:
        return EMPTY
    require_text(kind, raw)
    if len(raw) > CACHE_MAX_CHARS:
        return _normalise_opaque(kind, raw)
    return _cached_opaque(kind, raw)


def normalise_event(
    *,
    ip: str | None,
    device_id: str | None,
    phone: str | None,
    email: str | None,
    account_id: str | None,
    default_region: str | None = None,
) -> Normalised:
    """Normalise every identifier field of one event: the union of the per-field results.

    Parameters
    ----------
    ip, device_id, phone, email, account_id
        Raw fields as received; None or empty when absent.
    default_region
        Region code for phone numbers written without ``+`` or ``00``
        (see `scoring.identifiers_phone.normalise_phone`).

    Returns
    -------
    Normalised
        Keys in `KINDS` order, each kind at most once, and the flags of every field.

    Raises
    ------
    TypeError
        If a field is neither a str nor None.
    ValueError
        If `default_region` is not a region code known to phonenumbers.

    Examples
    --------
    >>> result = normalise_event(ip="11.22.33.44", device_id=None, phone="+44 20 7946 0321",
    ...                          email="Jo@Example.co.uk", account_id="acct-9")
    >>> [kind for kind, _ in result.keys]
    ['account', 'ip', 'ip_net', 'phone', 'phone_prefix', 'email', 'email_domain']
    >>> sorted(result.flags)
    ['phone_fixed']
    """
    account = normalise_opaque("account", account_id)
    device = normalise_opaque("device", device_id)
    address = normalise_ip(ip)
    number = normalise_phone(phone, default_region)
    mailbox = normalise_email(email)
    keys = account.keys + device.keys + address.keys + number.keys + mailbox.keys
    flags = account.flags | device.flags | address.flags | number.flags | mailbox.flags
    return Normalised(keys, flags)


def field_normaliser(field: str, default_region: str | None = None) -> Callable[[str], Normalised]:
    """The uncached normaliser of one raw event field (``ip``, ``device_id``, ``phone``,
    ``email`` or ``account_id``), for callers that normalise each distinct value once (the
    batch path): the same function the cached public normalisers call, without a cache to
    churn. Takes a str (callers skip None); gives exactly what `normalise_event` gives for it.

    >>> field_normaliser("email")("Jo@Mail.Example").keys
    (('email', 'jo@mail.example'), ('email_domain', 'mail.example'))
    """
    region = None if default_region is None else check_region(default_region)
    if field == "account_id":
        return partial(_normalise_opaque, "account")
    if field == "device_id":
        return partial(_normalise_opaque, "device")
    if field == "ip":
        return _normalise_ip
    if field == "phone":
        return lambda raw: _normalise_phone(raw, region)
    if field == "email":
        return _normalise_email
    raise ValueError(f"unknown identifier field {field!r}")


_CACHES = {
    "account_device": _cached_opaque,
    "ip": _cached_ip,
    "phone": _cached_phone,
    "email": _cached_email,
    "email_domain": domain_info,
}


def clear_caches() -> None:
    """Empty every normaliser cache (after a data package upgrade, or between tests).

    Examples
    --------
    >>> clear_caches()
    >>> cache_info()["ip"]
    (0, 0, 0)
    """
    for cached in _CACHES.values():
        cached.cache_clear()


def cache_info() -> dict[str, tuple[int, int, int]]:
    """Return (hits, misses, current entries) of each normaliser cache, by cache name.

    Examples
    --------
    >>> sorted(cache_info())
    ['account_device', 'email', 'email_domain', 'ip', 'phone']
    """
    result = {}
    for name, cached in _CACHES.items():
        info = cached.cache_info()
        result[name] = (info.hits, info.misses, info.currsize)
    return result
