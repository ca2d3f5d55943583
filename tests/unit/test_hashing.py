"""Keyed hashes (`scoring.hashing.KeyHasher`): truncated HMAC-SHA256 of ``kind:value``.

References: the HMAC-SHA-256 test vectors of RFC 4231 (``tests/data/hashing_rfc4231.json``,
each row naming its test case) check the reference, Python's own ``hmac`` and ``hashlib``; the
hasher is then checked against that reference. Truncation keeps the leftmost bytes, as RFC 2104
section 5 prescribes and RFC 4231 test case 5 shows.
"""

from __future__ import annotations

import hashlib
import hmac
import json
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.hashing import DIGEST_BYTES, KeyHasher

DATA = Path(__file__).parent.parent / "data"
VECTORS = json.loads((DATA / "hashing_rfc4231.json").read_text(encoding="utf-8"))["cases"]
KINDS = ("account", "device", "ip", "ip_net", "phone", "phone_prefix", "email", "email_domain")


def reference(key: bytes, message: bytes) -> bytes:
    """HMAC-SHA-256 by the standard library (checked against RFC 4231 below)."""
    return hmac.new(key, message, hashlib.sha256).digest()


@pytest.mark.parametrize("case", VECTORS, ids=lambda c: c["case"])
def test_reference_matches_rfc4231(case: dict[str, object]) -> None:
    """The reference reproduces RFC 4231, truncated vectors included (leftmost bits)."""
    key = bytes.fromhex(str(case["key_hex"]))
    data = bytes.fromhex(str(case["data_hex"]))
    bits = int(str(case["truncated_to_bits"]))
    assert reference(key, data)[: bits // 8].hex() == case["hmac_sha256_hex"]


@pytest.mark.parametrize("case", VECTORS, ids=lambda c: c["case"])
def test_digest_is_leftmost_bytes_of_hmac_sha256(case: dict[str, object]) -> None:
    """With each RFC 4231 key as the secret (short key "Jefe", block-size and longer keys), a
    digest is the leftmost `DIGEST_BYTES` of HMAC-SHA-256 over ``kind:value`` in UTF-8."""
    key = bytes.fromhex(str(case["key_hex"]))
    hasher = KeyHasher(key)
    data = bytes.fromhex(str(case["data_hex"])).decode("utf-8", errors="replace")
    for kind, value in (("email", "ana@quillpost.example"), ("device", data), ("ip", "")):
        full = reference(key, f"{kind}:{value}".encode())
        assert hasher.digest(kind, value) == full[:DIGEST_BYTES]


def test_rfc4231_case_2_key_by_hand() -> None:
    """RFC 4231 test case 2's key with a message of our own, spelled out byte for byte."""
    hasher = KeyHasher(b"Jefe")
    message = b"email:zo\xc3\xab@quillpost.example"  # UTF-8 of the e with diaeresis
    assert hasher.digest("email", "zoë@quillpost.example") == reference(b"Jefe", message)[:8]
    assert DIGEST_BYTES == 8


values = st.text(max_size=60)


@given(st.sampled_from(KINDS), values)
def test_deterministic_across_instances(kind: str, value: str) -> None:
    first = KeyHasher(b"not-a-real-secret").digest(kind, value)
    again = KeyHasher(b"not-a-real-secret").digest(kind, value)
    assert first == again
    assert len(first) == DIGEST_BYTES


@given(st.sampled_from(KINDS), values, st.binary(min_size=1, max_size=40))
def test_different_secrets_give_different_digests(kind: str, value: str, secret: bytes) -> None:
    """Distinct secrets, distinct digests (a 64-bit collision has probability 2**-64)."""
    other = secret + b"x"
    a, b = KeyHasher(secret), KeyHasher(other)
    assert a.digest(kind, value) != b.digest(kind, value)
    assert a.digest(kind, value) == reference(secret, f"{kind}:{value}".encode())[:8]


@given(values)
def test_different_kinds_give_different_digests(value: str) -> None:
    """The same value under two kinds (an account id that is also a device id) is kept apart."""
    hasher = KeyHasher(b"not-a-real-secret")
    digests = {hasher.digest(kind, value) for kind in KINDS}
    assert len(digests) == len(KINDS)
    assert hasher.hash_text("event", value) not in digests | {hasher.digest("event", value)}


def test_cache_is_per_secret() -> None:
    """Each hasher has its own cache: a cached digest never answers for another secret."""
    a, b = KeyHasher(b"secret-a"), KeyHasher(b"secret-b")
    assert a.digest("phone", "+15550100") != b.digest("phone", "+15550100")
    assert b.digest("phone", "+15550100") == reference(b"secret-b", b"phone:+15550100")[:8]


def test_empty_secret_is_refused() -> None:
    with pytest.raises(ValueError, match="secret must not be empty"):
        KeyHasher(b"")


def test_documented_collision_bound() -> None:
    """Birthday bound ``n**2 / 2**65`` for ``n`` identifiers in 64 bits (the birthday problem,
    probability about ``n**2 / (2 N)`` for ``N = 2**64``): the docstring's 3e-4 at 1e8."""
    n = 100_000_000
    assert n**2 / 2 ** (8 * DIGEST_BYTES + 1) < 3e-4


@given(
    st.binary(min_size=1, max_size=200),
    st.sampled_from(KINDS),
    st.lists(values, max_size=8),
)
def test_digest_many_equals_hmac_sha256(secret: bytes, kind: str, texts: list[str]) -> None:
    """The bulk digests (HMAC from precomputed key states) equal the standard library's HMAC
    for short, block-size and longer-than-block secrets, value by value and in order."""
    hasher = KeyHasher(secret)
    expected = [reference(secret, f"{kind}:{t}".encode())[:DIGEST_BYTES] for t in texts]
    assert hasher.digest_many(kind, texts) == expected
    assert [hasher.digest_uncached(kind, t) for t in texts] == expected


@pytest.mark.parametrize("size", [1, 31, 32, 63, 64, 65, 128, 200])
def test_precomputed_states_around_the_block_size(size: int) -> None:
    """Keys shorter than, equal to and longer than SHA-256's 64-byte block (RFC 2104: a longer
    key is hashed first) give the standard library's HMAC."""
    secret = bytes((7 + i) % 256 for i in range(size))
    hasher = KeyHasher(secret)
    assert hasher.digest("email", "a@b.example") == reference(secret, b"email:a@b.example")[:8]
