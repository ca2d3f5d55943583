"""E-mail normalisation against RFC 5321/5322, IDNA (RFC 5891, UTS #46) and the Public Suffix List.

Tables: ``tests/data/identifiers_email_cases.csv`` (addresses, RFC sections) and
``tests/data/identifiers_registrable_domains.csv`` (registrable domains by the publicsuffix.org
algorithm). The publicsuffix.org test vectors shipped inside the `publicsuffixlist` package are
run as well. Disposable domains are sampled from the packaged list at test time rather than
written here.
"""

from __future__ import annotations

import csv
import random
import re
from pathlib import Path

import disposable_email_domains
import idna
import publicsuffixlist
import pytest

from scoring.identifiers import normalise_email
from scoring.identifiers_email import MAX_ADDRESS_CHARS, MAX_LOCAL_OCTETS, domain_info

DATA = Path(__file__).parent.parent / "data"


def _rows(name: str) -> list[dict[str, str]]:
    with (DATA / name).open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


CASES = _rows("identifiers_email_cases.csv")
DOMAINS = _rows("identifiers_registrable_domains.csv")


@pytest.mark.parametrize("row", CASES, ids=[f"{i}:{r['raw']!r}" for i, r in enumerate(CASES)])
def test_conformance_case(row: dict[str, str]) -> None:
    """Each row: raw input gives the expected keys and exactly the expected flags."""
    result = normalise_email(row["raw"])
    assert result.get("email") == (row["email"] or None), row["source"]
    assert result.get("email_domain") == (row["email_domain"] or None), row["source"]
    assert result.flags == frozenset(row["flags"].split()), row["source"]


@pytest.mark.parametrize("row", DOMAINS, ids=[r["domain"] for r in DOMAINS])
def test_registrable_domain(row: dict[str, str]) -> None:
    """The registrable domain of each row, through the whole e-mail path."""
    result = normalise_email(f"jo@{row['domain']}")
    assert result.get("email_domain") == (row["registrable"] or None), row["source"]


def _psl_vectors() -> list[tuple[str, str | None]]:
    """The publicsuffix.org test vectors ``checkPublicSuffix(domain, expected)``, as shipped in
    the publicsuffixlist package (test_psl.txt); the null-input vector is skipped."""
    path = Path(publicsuffixlist.__file__).parent / "test_psl.txt"
    pattern = re.compile(r"^checkPublicSuffix\('([^']*)', (?:'([^']*)'|null)\);", re.MULTILINE)
    text = path.read_text(encoding="utf-8")
    return [(domain, expected or None) for domain, expected in pattern.findall(text)]


PSL_VECTORS = _psl_vectors()


def test_psl_vectors_were_found() -> None:
    assert len(PSL_VECTORS) > 60


@pytest.mark.parametrize(("domain", "expected"), PSL_VECTORS, ids=[d for d, _ in PSL_VECTORS])
def test_publicsuffix_org_vectors(domain: str, expected: str | None) -> None:
    """publicsuffix.org test vectors: our registrable domain, in A-label form (RFC 5891),
    equals the expected one. None means no registrable domain: the address is invalid."""
    info = domain_info(domain)
    registrable = info.registrable if info else None
    if expected is not None:
        expected = idna.encode(expected, uts46=True).decode("ascii")
    assert registrable == expected


DISPOSABLE = sorted(disposable_email_domains.blocklist)


def test_disposable_domains_from_the_packaged_list() -> None:
    """Entries sampled from the disposable_email_domains list are flagged, as are their
    subdomains; the flag follows the list, not a list of ours."""
    rng = random.Random(7)
    checked = 0
    for domain in rng.sample(DISPOSABLE, 200):
        info = domain_info(domain)
        if info is None:
            continue  # a few entries are themselves public suffixes or not host names
        assert "email_disposable" in normalise_email(f"jo@{domain}").flags, domain
        assert "email_disposable" in normalise_email(f"jo@mx.{domain}").flags, domain
        checked += 1
    assert checked > 150


def test_reserved_example_domains_are_not_disposable() -> None:
    """RFC 2606 example domains are on no list."""
    for address in ("jo@example.com", "jo@example.co.uk", "jo@mail.example.org"):
        assert "email_disposable" not in normalise_email(address).flags


def test_local_part_length_limit() -> None:
    """RFC 5321 section 4.5.3.1.1: a local part has at most 64 octets (UTF-8 counted)."""
    assert "email_invalid" not in normalise_email("a" * MAX_LOCAL_OCTETS + "@example.com").flags
    assert "email_invalid" in normalise_email("a" * (MAX_LOCAL_OCTETS + 1) + "@example.com").flags
    assert "email_invalid" in normalise_email("é" * 33 + "@example.com").flags  # 66 octets


def test_address_length_limit() -> None:
    """RFC 5321 section 4.5.3.1.3: a path has at most 256 octets with its angle brackets, so
    an address has at most 254 characters."""
    domain = ".".join(["a" * 61] * 3) + ".example.com"  # 197 characters
    local = "b" * (MAX_ADDRESS_CHARS - len(domain) - 1)
    assert len(f"{local}@{domain}") == MAX_ADDRESS_CHARS
    assert "email_invalid" not in normalise_email(f"{local}@{domain}").flags
    assert normalise_email(f"{local}b@{domain}").flags == frozenset({"email_invalid"})
    assert normalise_email(f"{local}b@{domain}").keys == ()


def test_invalid_address_keeps_its_cleaned_text_as_key() -> None:
    result = normalise_email("  Not An Address ")
    assert result.keys == (("email", "not an address"),)
    assert result.flags == frozenset({"email_invalid"})


def test_lone_surrogates_give_no_key() -> None:
    """Text that cannot be encoded as UTF-8 cannot be hashed downstream: flagged, no key."""
    result = normalise_email("jo\ud800@example.com")
    assert result.keys == ()
    assert result.flags == frozenset({"email_invalid"})


def test_non_text_is_a_type_error() -> None:
    with pytest.raises(TypeError, match="email must be a str or None, got bytes"):
        normalise_email(b"jo@example.com")  # type: ignore[arg-type]
