"""The store's encodings checked against published sources and a real redis-server.

- Digests in keys are base64url without padding: RFC 4648 section 10 test vectors, with the
  section 5 alphabet (``-`` and ``_`` for 62 and 63) and padding removed.
- One identifier = one slot: the Redis Cluster specification ("Keys distribution model" and
  "Hash tags") says the slot is CRC16 (XMODEM) of the key mod 16384, and only the part inside the
  first ``{...}`` is hashed when it is not empty. Its check value (CRC16 of "123456789" = 0x31C3)
  and its hash-tag examples are quoted from memory of that specification and verified here
  against the server itself.
- Parity with the embedded store rests on Redis adding sorted-set scores in IEEE 754 binary64
  arithmetic (ZINCRBY: "double precision floating point number", Redis command reference) and
  replying with enough digits to round-trip: checked bit for bit against Python's float addition.
"""

from __future__ import annotations

import struct
from typing import Any

import pytest
import redis
from hypothesis import given, settings
from hypothesis import strategies as st

from service.stores.redis_keys import (
    answer_key,
    b64,
    identifier_key,
    label_key,
    record_stream_key,
)

# (input bytes, base64url without padding, source)
BASE64URL_CASES = [
    (b"", "", "RFC 4648 s.10"),
    (b"f", "Zg", "RFC 4648 s.10 (Zg==)"),
    (b"fo", "Zm8", "RFC 4648 s.10 (Zm8=)"),
    (b"foo", "Zm9v", "RFC 4648 s.10"),
    (b"foob", "Zm9vYg", "RFC 4648 s.10 (Zm9vYg==)"),
    (b"fooba", "Zm9vYmE", "RFC 4648 s.10 (Zm9vYmE=)"),
    (b"foobar", "Zm9vYmFy", "RFC 4648 s.10"),
    (b"\xfb\xff", "-_8", "RFC 4648 s.5 alphabet: 62 is '-', 63 is '_' (standard: +/8=)"),
]

# (key, the string whose CRC16 gives its slot, source)
HASH_TAG_CASES = [
    ("{user1000}.following", "user1000", "Redis Cluster spec, Hash tags (from memory)"),
    ("{user1000}.followers", "user1000", "Redis Cluster spec, Hash tags (from memory)"),
    ("foo{}{bar}", "foo{}{bar}", "Redis Cluster spec: empty tag, whole key hashed (from memory)"),
    ("foo{{bar}}zap", "{bar", "Redis Cluster spec: first { to next } (from memory)"),
    ("foo{bar}{zap}", "bar", "Redis Cluster spec: first tag only (from memory)"),
]


@pytest.mark.parametrize(("data", "expected", "source"), BASE64URL_CASES)
def test_base64url_without_padding(data: bytes, expected: str, source: str) -> None:
    assert b64(data) == expected, source


@pytest.mark.redis
def test_crc16_check_value_of_the_cluster_spec(redis_cluster: list[Any]) -> None:
    """CRC16-XMODEM("123456789") = 0x31C3 (Redis Cluster spec, from memory); slot = mod 16384."""
    with redis_cluster[0].client() as c:
        assert c.cluster("KEYSLOT", "123456789") == 0x31C3 % 16384


@pytest.mark.redis
@pytest.mark.parametrize(("key", "hashed", "source"), HASH_TAG_CASES)
def test_hash_tag_examples_of_the_cluster_spec(
    redis_cluster: list[Any], key: str, hashed: str, source: str
) -> None:
    with redis_cluster[0].client() as c:
        assert c.cluster("KEYSLOT", key) == c.cluster("KEYSLOT", hashed), source


@pytest.mark.redis
def test_each_record_lives_in_the_slot_of_its_tag(redis_cluster: list[Any]) -> None:
    """Our keys put the whole id inside the tag: the slot is the tag's slot."""
    digest = bytes(range(1, 9))
    keys = {
        identifier_key("email", digest): "e" + b64(digest),
        answer_key(digest): b64(digest),
        label_key(digest): b64(digest),
        record_stream_key(517): "517",
    }
    with redis_cluster[0].client() as c:
        for key, tag in keys.items():
            assert c.cluster("KEYSLOT", key) == c.cluster("KEYSLOT", tag), key
        assert c.cluster("KEYSLOT", answer_key(digest)) == c.cluster("KEYSLOT", label_key(digest))


def _bits(x: float) -> bytes:
    return struct.pack(">d", x)


finite = st.floats(
    min_value=-1e300, max_value=1e300, allow_nan=False, allow_infinity=False, allow_subnormal=True
)


@pytest.mark.redis
@settings(max_examples=60)
@given(values=st.lists(finite, min_size=1, max_size=12))
def test_zincrby_adds_like_python_floats(redis_server: Any, values: list[float]) -> None:
    """Redis sorted-set scores are IEEE 754 binary64 and are sent back with enough digits:
    successive ZINCRBY give the bits of Python's left-to-right sum, each step."""
    with redis.Redis(port=redis_server.port) as c:
        c.delete("conformance{zset}")
        total = 0.0
        for v in values:
            got = c.zincrby("conformance{zset}", v, "m")
            total = total + v
            # + 0.0 folds -0.0 into 0.0: Redis keeps the sign of a first increment of -0.0
            # where Python's 0.0 + -0.0 gives 0.0; the stores never add a signed zero
            assert _bits(got + 0.0) == _bits(total + 0.0), (values, v)
        c.delete("conformance{zset}")


@pytest.mark.redis
@settings(max_examples=60)
@given(value=finite)
def test_zadd_score_round_trips_exactly(redis_server: Any, value: float) -> None:
    with redis.Redis(port=redis_server.port) as c:
        c.zadd("conformance{zadd}", {"m": value})
        assert _bits(c.zscore("conformance{zadd}", "m") or 0.0) == _bits(value)
        c.delete("conformance{zadd}")
