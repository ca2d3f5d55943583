"""Columnar planning for the batch path: identifier codes, buckets and flags of many events.

`Planner.plan` normalises and hashes one event; this module does the same for whole columns,
normalising each distinct raw value once with the very same per-field normalisers that
`normalise_event` combines, so both paths see identical keys and flags.
"""

from __future__ import annotations

import zlib
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from scoring.batch_identifiers import column_keys
from scoring.config import ScoringConfig
from scoring.features import EVENT_TYPES, FLAGS
from scoring.hashing import KeyHasher
from scoring.identifiers import field_normaliser

FIELDS = ("account_id", "device_id", "ip", "phone", "email")
_FLAG_BITS = {flag: 1 << i for i, flag in enumerate(FLAGS)}


@dataclass
class PlannedColumns:
    """Events as the batch path needs them, in input order.

    ``ids[kind]`` holds a dense identifier code per event (-1 when absent), ``buckets[kind]``
    that identifier's fan-out bucket, ``digests[kind][code]`` its keyed digest.
    """

    ts_s: np.ndarray
    type_index: np.ndarray
    amount: np.ndarray
    flags: np.ndarray
    ids: dict[str, np.ndarray]
    buckets: dict[str, np.ndarray]
    digests: dict[str, list[bytes]]
    sampled: np.ndarray

    def __len__(self) -> int:
        return len(self.ts_s)


def _dictionary(values: Sequence[str | None]) -> tuple[np.ndarray, pa.Array]:
    """Codes of each value (-1 for None) and the distinct values, via Arrow's dictionary
    encoding (one pass in C++ rather than a Python dictionary lookup per event)."""
    array = values if isinstance(values, pa.Array) else pa.array(values, type=pa.string())
    encoded = array.dictionary_encode()
    codes = pc.fill_null(encoded.indices, -1).to_numpy(zero_copy_only=False)
    return codes.astype(np.int64, copy=False), encoded.dictionary


def _bits(flags: frozenset[str]) -> int:
    return sum(_FLAG_BITS.get(f, 0) for f in flags)


def _buckets(digests: list[bytes], m: int) -> np.ndarray:
    """Fan-out bucket of each digest: bytes 4 to 8 read big-endian, modulo ``m`` (as
    `Planner.plan` computes them one at a time)."""
    if not digests:
        return np.zeros(0, dtype=np.int64)
    words = np.frombuffer(b"".join(digests), dtype=">u4").reshape(len(digests), -1)
    return words[:, 1].astype(np.int64) % m


class ColumnPlanner:
    """Plans columns of events under one configuration and hashing secret."""

    def __init__(
        self, config: ScoringConfig, hasher: KeyHasher, default_region: str | None = None
    ) -> None:
        self.config = config
        self.hasher = hasher
        self.default_region = default_region

    def plan(
        self,
        event_id: Sequence[str],
        ts_s: np.ndarray,
        event_type: Sequence[str],
        amount: np.ndarray,
        fields: dict[str, Sequence[str | None]],
    ) -> PlannedColumns:
        """Plan events given as columns; ``fields`` maps each of `FIELDS` to its column."""
        n = len(event_id)
        tracked = set(self.config.kinds)
        m = self.config.fanout_buckets
        ids: dict[str, np.ndarray] = {}
        buckets: dict[str, np.ndarray] = {}
        digests: dict[str, list[bytes]] = {}
        flags = np.zeros(n, dtype=np.int64)
        for field in FIELDS:
            codes, distinct = _dictionary(fields[field])
            normalise = field_normaliser(field, self.default_region)
            keys, results, fast_flags = column_keys(field, distinct, normalise)
            flag_bits = np.zeros(len(distinct) + 1, dtype=np.int64)  # code -1 picks the last 0
            for i, r in results:
                if r.flags:
                    flag_bits[i] = _bits(r.flags)
            for at, fast in fast_flags:
                flag_bits[at] = _bits(fast)
            flags |= flag_bits[codes]
            for kind, keys_of_value in keys.items():
                if kind not in tracked:
                    continue
                per_value, kind_digests = self._kind_codes(kind, keys_of_value)
                ids[kind] = np.append(per_value, -1)[codes]
                digests[kind] = kind_digests
                kind_buckets = np.append(_buckets(kind_digests, m), -1)
                buckets[kind] = kind_buckets[ids[kind]]
        for kind in self.config.kinds:
            if kind not in ids:
                ids[kind] = np.full(n, -1, dtype=np.int64)
                buckets[kind] = np.full(n, -1, dtype=np.int64)
                digests[kind] = []
        type_codes = {t: i for i, t in enumerate(EVENT_TYPES)}
        type_of, type_names = _dictionary(event_type)
        type_lookup = np.array(
            [type_codes.get(t, -1) for t in type_names.to_pylist()] + [-1], dtype=np.int64
        )
        return PlannedColumns(
            ts_s=np.asarray(ts_s, dtype=np.float64),
            type_index=type_lookup[type_of],
            amount=np.asarray(amount, dtype=np.float64),
            flags=(flags[:, None] >> np.arange(len(FLAGS))) & 1 == 1,
            ids=ids,
            buckets=buckets,
            digests=digests,
            sampled=self._sampled(event_id),
        )

    def _kind_codes(self, kind: str, keys: pa.Array) -> tuple[np.ndarray, list[bytes]]:
        """Each distinct raw value's key code (-1 if it has no key of this kind), and the
        digests in code order (codes in order of first appearance)."""
        encoded = keys.dictionary_encode()
        of_key = pc.fill_null(encoded.indices, -1).to_numpy(zero_copy_only=False)
        # codes follow the digests: two keys with one digest (a collision) share a code
        codes: dict[bytes, int] = {}
        distinct = encoded.dictionary.to_pylist()
        of_digest = [
            codes.setdefault(d, len(codes)) for d in self.hasher.digest_many(kind, distinct)
        ]
        remap = np.append(np.array(of_digest, dtype=np.int64), -1)
        return remap[of_key.astype(np.int64)], list(codes)

    def _sampled(self, event_id: Sequence[str]) -> np.ndarray:
        """Which events the maturity learning samples (`event.maturity_sampled`, per event)."""
        # the same test as `maturity_sampled`, with the CRC-32s taken by C-level maps: a
        # checksum below 2**32 is exact as a float64, so numpy's comparison is Python's
        threshold = self.config.negative_sample_rate * 4294967296.0
        crcs = np.fromiter(
            map(zlib.crc32, map(str.encode, event_id)), dtype=np.int64, count=len(event_id)
        )
        return crcs < threshold
