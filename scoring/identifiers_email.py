"""E-mail address normalisation: a mailbox key, the registrable domain and flags.

Decisions, each documented where it is made:

- The whole address is NFKC-normalised, trimmed and lower-cased (common practice: hardly any
  mailbox provider treats the local part as case-sensitive, though RFC 5321 section 2.4 allows
  it). The address splits at its last ``@``.
- A ``+tag`` sub-address is removed from an unquoted local part (common practice) and flagged
  ``email_subaddress``; a local part that would be left empty keeps its tag. Provider-specific
  rules (dots ignored by some providers) are not applied: they need a provider table.
- The domain loses one trailing dot (the DNS root) and is IDNA-encoded to its ASCII form (UTS #46
  non-transitional processing with the `idna` package, IDNA2008 RFC 5891), so the unicode and the
  punycode spellings give one key.
- ``email_invalid``: no ``@``; an empty local part, or one that is neither a dot-atom
  (RFC 5322 section 3.4.1, with UTF-8 allowed as in RFC 6531 section 3.3) nor a quoted string;
  a local part over 64 octets (RFC 5321 section 4.5.3.1.1); an address over 254 characters
  (RFC 5321 section 4.5.3.1.3 less the angle brackets); a domain that is not a valid host name
  (RFC 1123 section 2.1 labels, RFC 5891 for IDNs), is over 253 characters, has an all-numeric
  top label (RFC 3696 section 2), is an address literal, or has no registrable part (a single
  label, or a public suffix itself). An invalid address keeps an ``email`` key of the cleaned
  text (trimmed, NFKC, lower case) and gets no ``email_domain`` key; text over 254 characters,
  or that cannot be encoded as UTF-8, gets no key at all.
- ``email_domain`` is the registrable domain: the public suffix plus one label, by the algorithm
  of publicsuffix.org, with the Public Suffix List snapshot shipped in the `publicsuffixlist`
  package (ICANN and private sections; never fetched at run time).
- ``email_disposable``: the domain, its registrable domain or any name between them is on the
  list shipped in the `disposable_email_domains` package.
- ``email_unknown_tld``: the top-level label is not on the Public Suffix List (a typo such as
  ``.con`` or an invented name); the address is otherwise kept valid.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache, lru_cache

import disposable_email_domains
import idna
from publicsuffixlist import PublicSuffixList

from scoring.identifiers_base import (
    CACHE_ENTRIES,
    CACHE_MAX_CHARS,
    EMPTY,
    Normalised,
    flag_set,
    fold_case,
    require_text,
    utf8_safe,
)

MAX_ADDRESS_CHARS = 254
MAX_LOCAL_OCTETS = 64
MAX_DOMAIN_CHARS = 253
DOMAIN_CACHE_ENTRIES = 2**14
"""Bound of the per-domain cache: few domains carry most addresses."""

# atext of RFC 5322 section 3.2.3 (lower case) plus any non-ASCII scalar value (RFC 6531).
_ATEXT = r"[a-z0-9!#$%&'*+/=?^_`{|}~\-\u0080-\ud7ff\ue000-\U0010ffff]+"
_DOT_ATOM = re.compile(rf"{_ATEXT}(?:\.{_ATEXT})*")
_QUOTED = re.compile(r'"(?:[\x20\x21\x23-\x5b\x5d-\x7e]|\\[\x20-\x7e])*"')
_LDH_LABEL = re.compile(r"[a-z0-9](?:[a-z0-9-]{0,61}[a-z0-9])?")
_INVALID_NO_KEY = Normalised((), flag_set(["email_invalid"]))


@dataclass(frozen=True, slots=True)
class DomainInfo:
    """What the e-mail normaliser knows of one domain.

    Examples
    --------
    >>> domain_info("Mail.Example.co.uk.")
    DomainInfo(ascii='mail.example.co.uk', registrable='example.co.uk', flags=frozenset())
    """

    ascii: str
    registrable: str
    flags: frozenset[str]


@cache
def _public_suffixes() -> PublicSuffixList:
    # Built on first use (about 0.1 s) from the snapshot inside the package: no network.
    return PublicSuffixList()


@cache
def _disposable() -> frozenset[str]:
    return frozenset(name.lower() for name in disposable_email_domains.blocklist)


def _ascii_domain(domain: str) -> str | None:
    """IDNA-encode and check a host name; None when it is not one."""
    if domain.isascii() and "xn--" not in domain:
        labels = domain.split(".")
        ascii_name = domain if all(_LDH_LABEL.fullmatch(label) for label in labels) else None
    else:
        try:
            ascii_name = idna.encode(domain, uts46=True, std3_rules=True).decode("ascii")
        except (idna.IDNAError, UnicodeError, ValueError):
            return None
    if ascii_name is None or len(ascii_name) > MAX_DOMAIN_CHARS:
        return None
    return None if ascii_name.rpartition(".")[2].isdigit() else ascii_name


def _domain_flags(ascii_name: str, registrable: str) -> frozenset[str]:
    flags = []
    labels = ascii_name.split(".")
    names = (".".join(labels[i:]) for i in range(len(labels) - registrable.count(".")))
    if any(name in _disposable() for name in names):
        flags.append("email_disposable")
    if _public_suffixes().publicsuffix(ascii_name, accept_unknown=False) is None:
        flags.append("email_unknown_tld")
    return flag_set(flags)


@lru_cache(maxsize=DOMAIN_CACHE_ENTRIES)
def domain_info(domain: str) -> DomainInfo | None:
    """Return the ASCII form, registrable domain and flags of a domain; None if it is invalid.

    Cached: a least-recently-used cache of `DOMAIN_CACHE_ENTRIES` = 2**14 domains.

    Examples
    --------
    >>> domain_info("x.y.city.kawasaki.jp").registrable
    'city.kawasaki.jp'
    >>> domain_info("co.uk") is None
    True
    """
    domain = fold_case(domain)
    ascii_name = _ascii_domain(domain[:-1] if domain.endswith(".") else domain)
    if ascii_name is None:
        return None
    registrable = _public_suffixes().privatesuffix(ascii_name)
    if registrable is None:
        return None
    return DomainInfo(ascii_name, registrable, _domain_flags(ascii_name, registrable))


def _valid_local(local: str) -> bool:
    if len(local.encode("utf-8")) > MAX_LOCAL_OCTETS:
        return False
    return bool(_DOT_ATOM.fullmatch(local) or _QUOTED.fullmatch(local))


def _without_subaddress(local: str) -> str:
    if local.startswith('"'):
        return local
    base = local.partition("+")[0]
    return base or local


def _normalise_email(raw: str) -> Normalised:
    text = fold_case(raw)
    if not text:
        return EMPTY
    if len(text) > MAX_ADDRESS_CHARS or not utf8_safe(text):
        return _INVALID_NO_KEY  # no one's address: keep absurd text out of the keys
    invalid = Normalised((("email", text),), _INVALID_NO_KEY.flags)
    local, at, domain = text.rpartition("@")
    base = _without_subaddress(local)
    # The length test keeps huge garbage out of the domain cache.
    info = domain_info(domain) if at and len(domain) <= MAX_DOMAIN_CHARS + 1 else None
    if info is None or not (_valid_local(local) and _valid_local(base)):
        return invalid
    address = f"{base}@{info.ascii}"
    if len(address) > MAX_ADDRESS_CHARS:  # the A-label form can be longer than the text
        return invalid
    flags = (info.flags | {"email_subaddress"}) if base != local else info.flags
    keys = (("email", address), ("email_domain", info.registrable))
    return Normalised(keys, flag_set(flags))


_cached_email = lru_cache(maxsize=CACHE_ENTRIES)(_normalise_email)


def normalise_email(raw: str | None) -> Normalised:
    """Normalise a raw e-mail field into ``email`` and ``email_domain`` keys with flags.

    Never raises on text: garbage is flagged ``email_invalid``; None, empty or blank text gives
    no keys and no flags. Results are cached on the raw value (a least-recently-used cache of
    `CACHE_ENTRIES` = 2**17 entries; values longer than 512 characters bypass it, and domains
    have a cache of their own). See the module docstring for each rule.

    Parameters
    ----------
    raw
        The e-mail field as received, e.g. ``" Jo.Doe+promo@Mail.Example.co.uk "``.

    Returns
    -------
    Normalised
        Keys ``email`` and ``email_domain`` (valid addresses only); flags among
        ``email_invalid``, ``email_subaddress``, ``email_disposable``, ``email_unknown_tld``.

    Raises
    ------
    TypeError
        If `raw` is neither a str nor None.

    Examples
    --------
    >>> result = normalise_email(" Jo.Doe+promo@Mail.Example.co.uk. ")
    >>> result.keys
    (('email', 'jo.doe@mail.example.co.uk'), ('email_domain', 'example.co.uk'))
    >>> result.flags
    frozenset({'email_subaddress'})
    >>> normalise_email("jo@bücher.example").get("email")
    'jo@xn--bcher-kva.example'
    >>> normalise_email("no-at-sign").flags
    frozenset({'email_invalid'})
    """
    if raw is None:
        return EMPTY
    require_text("email", raw)
    if len(raw) > CACHE_MAX_CHARS:
        return _normalise_email(raw)
    return _cached_email(raw)
