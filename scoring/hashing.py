"""Keyed hashes of identifier values: what the store, the logs and the files see instead.

An identifier value never leaves the scoring core in clear: it is normalised, then hashed with
HMAC-SHA256 (RFC 2104) under a configured secret, and the first `DIGEST_BYTES` bytes are kept.
Without the secret, a digest cannot be matched against a list of candidate values.

Eight bytes keep records small; two different identifiers of one kind collide with probability
about ``n**2 / 2**65`` for ``n`` identifiers (the birthday bound): below 3e-4 for 100 million.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable
from functools import lru_cache
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from hashlib import _Hash

DIGEST_BYTES = 8


class KeyHasher:
    """HMAC-SHA256 of ``kind:value`` under a secret, truncated to `DIGEST_BYTES` bytes.

    Results are cached per (kind, value) in a bounded LRU cache.

    Examples
    --------
    >>> h = KeyHasher(b"not-a-real-secret")
    >>> d = h.digest("email", "ana@quillpost.example")
    >>> len(d), d == h.digest("email", "ana@quillpost.example")
    (8, True)
    >>> d == KeyHasher(b"another-secret").digest("email", "ana@quillpost.example")
    False
    """

    def __init__(self, secret: bytes, cache_size: int = 1 << 18) -> None:
        if not secret:
            raise ValueError("the hashing secret must not be empty")
        key = hashlib.sha256(secret).digest()  # BLAKE2b keys are at most 64 bytes
        self._blake = hashlib.blake2b(key=key, digest_size=DIGEST_BYTES, person=b"eventid")
        self._inner, self._outer = _hmac_states(secret)

        @lru_cache(maxsize=cache_size)
        def _digest(kind: str, value: str) -> bytes:
            return self._hmac(f"{kind}:{value}".encode())

        self.digest = _digest

    def _hmac(self, message: bytes) -> bytes:
        inner = self._inner.copy()
        inner.update(message)
        outer = self._outer.copy()
        outer.update(inner.digest())
        return outer.digest()[:DIGEST_BYTES]

    def hash_text(self, purpose: str, value: str) -> bytes:
        """Digest of a value that is not an identifier (an event id, say), kept apart by purpose.

        Keyed BLAKE2b (RFC 7693, keyed mode: a MAC in its own right), which costs less than half
        of HMAC-SHA256; event ids are hashed once per event, so this is on every event's path.
        Not cached: event ids rarely repeat and would only push identifiers out of the cache.
        """
        h = self._blake.copy()
        h.update(f"{purpose}:{value}".encode())
        return h.digest()

    def digest_uncached(self, kind: str, value: str) -> bytes:
        """`digest` without the cache, for callers that hash each distinct value once."""
        return self._hmac(f"{kind}:{value}".encode())

    def digest_many(self, kind: str, values: Iterable[str]) -> list[bytes]:
        """`digest` of each value, in order, without the cache (for distinct values).

        >>> h = KeyHasher(b"not-a-real-secret")
        >>> h.digest_many("ip", ["11.22.33.44"]) == [h.digest("ip", "11.22.33.44")]
        True
        """
        inner_copy, outer_copy = self._inner.copy, self._outer.copy
        prefix = f"{kind}:"
        out = []
        for value in values:
            inner = inner_copy()
            inner.update((prefix + value).encode())
            outer = outer_copy()
            outer.update(inner.digest())
            out.append(outer.digest()[:DIGEST_BYTES])
        return out


def _hmac_states(secret: bytes) -> tuple[_Hash, _Hash]:
    """SHA-256 states after the padded key's inner and outer blocks (RFC 2104 section 2).

    Every HMAC under one key starts from these two states; copying them saves two of the four
    compressions per message and OpenSSL's per-call key set-up, which cost more than the hash.
    """
    block = 64  # SHA-256's block size in bytes
    key = hashlib.sha256(secret).digest() if len(secret) > block else secret
    key = key.ljust(block, b"\0")
    inner = hashlib.sha256(bytes(b ^ 0x36 for b in key))
    outer = hashlib.sha256(bytes(b ^ 0x5C for b in key))
    return inner, outer
