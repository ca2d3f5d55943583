"""Keyed hashes of identifier values: what the store, the logs and the files see instead.

An identifier value never leaves the scoring core in clear: it is normalised, then hashed with
HMAC-SHA256 (RFC 2104) under a configured secret, and the first `DIGEST_BYTES` bytes are kept.
Without the secret, a digest cannot be matched against a list of candidate values.

Eight bytes keep records small; two different identifiers of one kind collide with probability
about ``n**2 / 2**65`` for ``n`` identifiers (the birthday bound): below 3e-4 for 100 million.
"""

from __future__ import annotations

import hashlib
import hmac
from functools import lru_cache

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
        self._secret = secret
        key = hashlib.sha256(secret).digest()  # BLAKE2b keys are at most 64 bytes
        self._blake = hashlib.blake2b(key=key, digest_size=DIGEST_BYTES, person=b"eventid")

        @lru_cache(maxsize=cache_size)
        def _digest(kind: str, value: str) -> bytes:
            message = f"{kind}:{value}".encode()
            return hmac.digest(self._secret, message, "sha256")[:DIGEST_BYTES]

        self.digest = _digest

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
        message = f"{kind}:{value}".encode()
        return hmac.digest(self._secret, message, "sha256")[:DIGEST_BYTES]
