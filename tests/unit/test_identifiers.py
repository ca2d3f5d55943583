"""The public identifier API: opaque identifiers, whole events, caching and the module boundary."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import scoring
from scoring.identifiers import (
    CACHE_ENTRIES,
    FLAGS,
    KINDS,
    OPAQUE_MAX_CHARS,
    Normalised,
    cache_info,
    clear_caches,
    normalise_email,
    normalise_event,
    normalise_ip,
    normalise_opaque,
    normalise_phone,
)


def test_kinds() -> None:
    assert KINDS == (
        "account",
        "device",
        "ip",
        "ip_net",
        "phone",
        "phone_prefix",
        "email",
        "email_domain",
    )


@pytest.mark.parametrize(
    ("kind", "raw", "keys", "flags"),
    [
        ("device", "  Dev-42\t", (("device", "Dev-42"),), set()),
        ("device", "ＤＥＶ－４２", (("device", "DEV-42"),), set()),  # NFKC, case kept
        ("account", "acct 9", (("account", "acct 9"),), set()),
        ("account", "", (), set()),
        ("account", "   ", (), set()),
        ("device", "null", (), {"device_placeholder"}),
        ("device", "Undefined", (), {"device_placeholder"}),
        ("device", "00000000-0000-0000-0000-000000000000", (), {"device_placeholder"}),
        ("account", "0", (), {"account_placeholder"}),
        ("account", "-", (), {"account_placeholder"}),
        ("device", "d\ud800", (), {"device_invalid"}),
    ],
)
def test_opaque(kind: str, raw: str, keys: tuple[tuple[str, str], ...], flags: set[str]) -> None:
    """Opaque identifiers: trimmed, NFKC, case kept; placeholders and unencodable text keyless."""
    result = normalise_opaque(kind, raw)
    assert result.keys == keys
    assert result.flags == frozenset(flags)


def test_opaque_truncation() -> None:
    """Values over OPAQUE_MAX_CHARS are cut to it and flagged; a cut that ends in blanks is
    trimmed so that the key stays a fixed point."""
    result = normalise_opaque("device", "d" * 300)
    assert result.keys == (("device", "d" * OPAQUE_MAX_CHARS),)
    assert result.flags == frozenset({"device_truncated"})
    blank_at_cut = normalise_opaque("account", "a" * 255 + " " + "b" * 10)
    assert blank_at_cut.get("account") == "a" * 255
    assert normalise_opaque("account", "a" * 255).keys == blank_at_cut.keys


def test_opaque_kind_is_checked() -> None:
    with pytest.raises(ValueError, match=r"kind must be one of \('account', 'device'\), got 'ip'"):
        normalise_opaque("ip", "x")


@pytest.mark.parametrize("normalise", [normalise_ip, normalise_phone, normalise_email])
def test_absent_fields(normalise: object) -> None:
    for raw in (None, "", "  ", "\u3000"):
        assert normalise(raw) == Normalised()  # type: ignore[operator]


def test_event_is_the_union_of_its_fields() -> None:
    fields = {
        "ip": "[2a00:1:2:3::7]:443",
        "device_id": " dev-1 ",
        "phone": "+44 7700 900123",
        "email": "Jo+x@Example.co.uk",
        "account_id": "acct-9",
    }
    result = normalise_event(**fields)
    parts = [
        normalise_opaque("account", fields["account_id"]),
        normalise_opaque("device", fields["device_id"]),
        normalise_ip(fields["ip"]),
        normalise_phone(fields["phone"]),
        normalise_email(fields["email"]),
    ]
    assert result.keys == tuple(key for part in parts for key in part.keys)
    assert result.flags == frozenset().union(*(part.flags for part in parts))
    assert [kind for kind, _ in result.keys] == list(KINDS)


def test_event_with_nothing() -> None:
    result = normalise_event(ip=None, device_id="", phone=None, email=" ", account_id=None)
    assert result == Normalised()


def test_event_default_region() -> None:
    result = normalise_event(
        ip=None, device_id=None, phone="020 7946 0321", email=None, account_id=None,
        default_region="GB",
    )  # fmt: skip
    assert result.get("phone") == "+442079460321"


def test_event_type_errors_name_the_field() -> None:
    with pytest.raises(TypeError, match="device must be a str or None, got int"):
        normalise_event(ip=None, device_id=7, phone=None, email=None, account_id=None)  # type: ignore[arg-type]


def test_flags_are_declared() -> None:
    """Every flag the table-driven tests expect is declared in FLAGS."""
    samples = [
        normalise_ip("::1"),
        normalise_ip("nope"),
        normalise_phone("+44 56 1234 5678 x1"),
        normalise_phone("07700 900123"),
        normalise_email("jo+x@example.con"),
        normalise_opaque("device", "x" * 400),
    ]
    for result in samples:
        assert result.flags <= FLAGS


def test_results_are_cached_on_the_raw_value() -> None:
    """A repeated raw value returns the very same result object from the cache."""
    clear_caches()
    first = normalise_email("cache.check@example.com")
    assert normalise_email("cache.check@example.com") is first
    hits, misses, size = cache_info()["email"]
    assert (hits, misses, size) == (1, 1, 1)


def test_cache_bound() -> None:
    from scoring import identifiers_email, identifiers_ip, identifiers_phone

    for cached in (
        identifiers_ip._cached_ip,
        identifiers_phone._cached_phone,
        identifiers_email._cached_email,
    ):
        assert cached.cache_parameters()["maxsize"] == CACHE_ENTRIES


def test_huge_values_bypass_the_cache() -> None:
    """A megabyte of garbage is flagged, not cached (it would pin memory in the cache)."""
    clear_caches()
    huge = "9" * 1_000_000
    assert normalise_ip(huge).flags == frozenset({"ip_invalid"})
    assert "phone_invalid" in normalise_phone(huge).flags
    assert normalise_email(huge).flags == frozenset({"email_invalid"})
    assert normalise_email(f"jo@{huge}.com").flags == frozenset({"email_invalid"})
    assert normalise_opaque("device", huge).flags == frozenset({"device_truncated"})
    assert all(size == 0 for _, _, size in cache_info().values())


FORBIDDEN = {"redis", "fastapi", "asyncio", "os", "io", "pathlib", "time", "datetime", "service"}


def test_identifier_modules_stay_pure() -> None:
    """scoring/ imports neither I/O, environment, clock nor service/ (house rule)."""
    root = Path(scoring.__file__).parent
    for path in sorted(root.glob("identifiers*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            else:
                continue
            assert not {name.split(".")[0] for name in names} & FORBIDDEN, (path.name, names)
