"""Value types and text helpers shared by the identifier normalisers.

The public names are re-exported by `scoring.identifiers`; import them from there.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterable
from typing import NamedTuple

KINDS: tuple[str, ...] = (
    "account",
    "device",
    "ip",
    "ip_net",
    "phone",
    "phone_prefix",
    "email",
    "email_domain",
)
"""Every identifier kind, in the order `Normalised.keys` lists them."""

CACHE_ENTRIES = 2**17
"""Bound of each per-field normaliser's least-recently-used cache (entries)."""

CACHE_MAX_CHARS = 512
"""Raw values longer than this are normalised without the cache, so that a few huge garbage
values cannot pin megabytes in it. No real identifier is that long."""

_FOLD_ROUNDS = 4


class Normalised(NamedTuple):
    """Identifier keys and flags derived from raw event fields.

    A named tuple: immutable and cheap to build (hundreds of thousands are built per backfill).

    Attributes
    ----------
    keys
        ``(kind, canonical value)`` pairs in `KINDS` order, each kind at most once.
    flags
        Observations about the raw values, such as ``"ip_invalid"`` or ``"email_disposable"``.

    Examples
    --------
    >>> n = Normalised((("ip", "192.0.2.1"),), frozenset({"ip_special"}))
    >>> n.get("ip"), n.get("phone")
    ('192.0.2.1', None)
    """

    keys: tuple[tuple[str, str], ...] = ()
    flags: frozenset[str] = frozenset()

    def get(self, kind: str) -> str | None:
        """Return the canonical value of `kind`, or None when this result has no such key.

        Examples
        --------
        >>> Normalised((("device", "d-1"),)).get("device")
        'd-1'
        """
        for key_kind, value in self.keys:
            if key_kind == kind:
                return value
        return None


EMPTY = Normalised()
"""The result for an absent field: no keys, no flags."""

_INTERNED_FLAGS: dict[frozenset[str], frozenset[str]] = {}


def flag_set(flags: Iterable[str]) -> frozenset[str]:
    """Return `flags` as a frozenset shared with every equal set built before.

    Results sit in caches by the hundred thousand while only a few hundred distinct flag sets
    exist, so sharing them keeps the caches small.

    Examples
    --------
    >>> flag_set(["ip_v6"]) is flag_set(("ip_v6",))
    True
    """
    frozen = frozenset(flags)
    return _INTERNED_FLAGS.setdefault(frozen, frozen)


def require_text(field: str, raw: object) -> None:
    """Raise TypeError unless `raw` is a str (None is handled by the callers).

    Examples
    --------
    >>> require_text("ip", "192.0.2.1")
    >>> require_text("ip", 3232235777)
    Traceback (most recent call last):
    ...
    TypeError: ip must be a str or None, got int
    """
    if not isinstance(raw, str):
        raise TypeError(f"{field} must be a str or None, got {type(raw).__name__}")


def fold_width(raw: str) -> str:
    """NFKC-normalise and trim `raw`, so full-width digits and the like fold to ASCII.

    Examples
    --------
    >>> fold_width(" １９２．０．２．１ ")
    '192.0.2.1'
    """
    return unicodedata.normalize("NFKC", raw).strip()


def fold_case(raw: str) -> str:
    """NFKC-normalise, lower-case and trim `raw`, repeated until the text stops changing.

    One round is not always enough: NFKC can produce capitals (U+3386 SQUARE MB becomes
    ``MB``) and lower-casing can produce text that NFKC changes again, and a key must be a
    fixed point so that normalising it again gives itself.

    Examples
    --------
    >>> fold_case(" Ｍａｉｌ@Example.COM ")
    'mail@example.com'
    >>> fold_case("㎆")
    'mb'
    """
    text = raw
    for _ in range(_FOLD_ROUNDS):
        folded = unicodedata.normalize("NFKC", text).lower().strip()
        if folded == text:
            break
        text = folded
    return text


def utf8_safe(text: str) -> bool:
    """Tell whether `text` encodes to UTF-8 (False when it holds lone surrogates).

    Keys are hashed as UTF-8 downstream, so a key must encode.

    Examples
    --------
    >>> utf8_safe("d-1"), utf8_safe("d-\\ud800")
    (True, False)
    """
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True
