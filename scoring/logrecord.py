"""Compact records of scored events, kept until their labels can arrive; and stored answers.

Learning from a label that arrives weeks after its event needs the features *as they were scored*
and the identifiers the event touched. Both are kept per event for the label horizon, so they are
packed tightly: identifier digests for the kinds present, and features quantised to one byte each
(steps of 1/16 on log scales), stored sparsely (a bit mask, then one byte for each graded feature
that differs from its default; a yes/no feature is its mask bit alone). Times are kept to the
second. Only the kinds that carry label statistics keep their digests.

The learner learns from the decoded (quantised) features in every mode, live and backfill alike,
so both learn exactly the same model from the same stream.
"""

from __future__ import annotations

import zlib
from collections.abc import Sequence
from dataclasses import dataclass

import msgpack
import numpy as np

from scoring.config import ScoringConfig
from scoring.features import BINARY, LOG, SIGNED, FeatureLayout
from scoring.hashing import DIGEST_BYTES
from scoring.prior import Prior
from scoring.reasons import display_round

STEP = 16.0
_DEFAULT_CODE = {LOG: 0, BINARY: 0, SIGNED: 128}


class RecordError(ValueError):
    """Bytes that are not a record of this layout."""


def quantise(value: float, scale: str) -> int:
    """One-byte code of a feature value.

    >>> quantise(2.5, "log"), quantise(-1.0, "signed"), quantise(1.0, "binary"), quantise(99, "log")
    (40, 112, 1, 255)
    """
    if scale == BINARY:
        return 1 if value else 0
    if scale == SIGNED:
        return max(0, min(255, round(value * STEP) + 128))
    return max(0, min(255, round(value * STEP)))


def dequantise(code: int, scale: str) -> float:
    """Feature value of a one-byte code.

    >>> dequantise(40, "log"), dequantise(112, "signed"), dequantise(1, "binary")
    (2.5, -1.0, 1.0)
    """
    if scale == BINARY:
        return float(code)
    if scale == SIGNED:
        return (code - 128) / STEP
    return code / STEP


@dataclass(frozen=True)
class EventRecord:
    """A scored (or recorded) event as the learner needs it.

    ``features`` is None for events recorded without scoring (their labels still update the
    identifiers' label statistics, but teach the model nothing).
    """

    ts_s: float
    identifiers: tuple[tuple[str, bytes], ...]
    features: tuple[float, ...] | None
    risk: float
    model_version: int


class RecordCodec:
    """Encodes and decodes `EventRecord` bytes for one configuration.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> codec = RecordCodec(cfg)
    >>> x = [0.0] * len(codec.layout.names)
    >>> x[0] = 2.5
    >>> rec = EventRecord(1_790_000_000.0, (("device", b"12345678"),), tuple(x), 0.25, 3)
    >>> data = codec.encode(rec)
    >>> back = codec.decode(data)
    >>> len(data) < 40, back.features == rec.features, back.identifiers == rec.identifiers
    (True, True, True)
    >>> round(back.risk, 4)     # risk is kept in 16 bits
    0.25
    """

    def __init__(self, config: ScoringConfig) -> None:
        self.config = config
        self.layout = FeatureLayout.of(config)
        self._kinds = config.label_kinds
        self._scales = self.layout.scales
        self._defaults = [_DEFAULT_CODE[s] for s in self._scales]
        self._defaults_array = np.asarray(self._defaults, dtype=np.float64)
        self._offsets = np.asarray([128.0 if s == SIGNED else 0.0 for s in self._scales])
        self._multipliers = np.asarray([1.0 if s == BINARY else STEP for s in self._scales])
        self._graded = np.asarray([s != BINARY for s in self._scales])

    def encode(self, record: EventRecord) -> bytes:
        kinds_mask = 0
        digests = bytearray()
        present = dict(record.identifiers)
        for i, kind in enumerate(self._kinds):
            if kind in present:
                kinds_mask |= 1 << i
                digests += present[kind]
        mask, codes = self._pack_features(record.features)
        body = [
            round(record.ts_s),
            kinds_mask,
            bytes(digests),
            mask,
            codes,
            round(record.risk * 65535),
            record.model_version,
        ]
        return bytes(msgpack.packb(body, use_bin_type=True))

    def _pack_features(self, features: Sequence[float] | None) -> tuple[bytes | None, bytes]:
        if features is None:
            return None, b""
        x = np.asarray(features, dtype=np.float64)
        if x.shape != self._defaults_array.shape:
            raise RecordError(f"expected {len(self._scales)} features, got {x.shape}")
        codes = self.codes(x)
        differs = codes != self._defaults_array
        mask = np.packbits(differs, bitorder="little").tobytes()
        return mask, codes[differs & self._graded].astype(np.uint8).tobytes()

    def codes(self, x: np.ndarray) -> np.ndarray:
        """`quantise` applied to a feature vector (or a matrix of them, one row per event)."""
        codes: np.ndarray = np.rint(x * self._multipliers)
        codes += self._offsets
        np.clip(codes, 0.0, 255.0, out=codes)
        return codes

    def decode(self, data: bytes) -> EventRecord:
        """Parse `encode` output; raises `RecordError` on anything else."""
        try:
            body = msgpack.unpackb(data)
        except (ValueError, TypeError, msgpack.ExtraData) as exc:
            raise RecordError(f"not an event record: {str(exc) or 'malformed msgpack'}") from exc
        problem = self._shape_problem(body)
        if problem is not None:
            raise RecordError(f"not an event record of this layout: {problem}")
        ts_s, kinds_mask, digests, mask, codes, risk, version = body
        identifiers = []
        at = 0
        for i, kind in enumerate(self._kinds):
            if kinds_mask >> i & 1:
                identifiers.append((kind, bytes(digests[at : at + DIGEST_BYTES])))
                at += DIGEST_BYTES
        features = None if mask is None else self._unpack_features(mask, codes)
        return EventRecord(float(ts_s), tuple(identifiers), features, risk / 65535, version)

    def _shape_problem(self, body: object) -> str | None:
        """What makes an unpacked body unusable by `decode`, or None when it is usable."""
        if not isinstance(body, list) or len(body) != 7:
            return "expected a list of 7 fields"
        ts_s, kinds_mask, digests, mask, codes, risk, version = body
        if not all(type(v) is int for v in (ts_s, kinds_mask, risk, version)):
            return "time, kinds mask, risk and model version must be integers"
        if not (0 <= kinds_mask < 1 << len(self._kinds) and 0 <= risk <= 65535):
            return "kinds mask or risk out of range"
        if not isinstance(digests, bytes) or len(digests) != DIGEST_BYTES * kinds_mask.bit_count():
            return "identifier digests do not match the kinds mask"
        if mask is None:
            return None if codes == b"" else "feature codes without a feature mask"
        if not isinstance(mask, bytes) or len(mask) != (len(self._scales) + 7) // 8:
            return "feature mask has the wrong size"
        bits = np.unpackbits(np.frombuffer(mask, dtype=np.uint8), bitorder="little")
        graded = int(np.count_nonzero(bits[: len(self._scales)].astype(bool) & self._graded))
        if not isinstance(codes, bytes) or len(codes) != graded:
            return "feature codes do not match the feature mask"
        return None

    def _unpack_features(self, mask: bytes, codes: bytes) -> tuple[float, ...]:
        out = []
        next_code = iter(codes)
        for i, scale in enumerate(self._scales):
            if mask[i >> 3] >> (i & 7) & 1:
                code = 1 if scale == BINARY else next(next_code)
            else:
                code = self._defaults[i]
            out.append(dequantise(code, scale))
        return tuple(out)

    def quantised(self, features: Sequence[float]) -> tuple[float, ...]:
        """Features as the learner will see them after a round trip through a record."""
        mask, codes = self._pack_features(features)
        assert mask is not None
        return self._unpack_features(mask, codes)


@dataclass(frozen=True)
class StoredAnswer:
    """The answer given for an event id, kept for idempotent retries.

    ``reasons`` are (code, quoted number) pairs, ``risk`` the probability of fraud.
    """

    risk: float
    decision: str
    reasons: tuple[tuple[str, float], ...]
    model_version: int


class AnswerCodec:
    """Packs `StoredAnswer` into a few dozen bytes for one configuration.

    Retries are rare but every event's answer is kept for the idempotency window, so the stored
    form is small: the risk in millionths (answers are given to 6 decimals), the decision and
    each reason code as small indexes, each reason's number on the grid its words show
    (`reasons.display_round`), and a byte that tells one configuration's code table from
    another's.

    Examples
    --------
    >>> codec = AnswerCodec(ScoringConfig())
    >>> reasons = (("device.accounts", 7.2), ("amount.vs_usual", 6.04))
    >>> data = codec.encode(StoredAnswer(0.1234564, "review", reasons, 4))
    >>> len(data) < 25
    True
    >>> back = codec.decode(data)
    >>> back.risk, back.decision, back.reasons
    (0.123456, 'review', (('device.accounts', 7.2), ('amount.vs_usual', 6.0)))
    """

    def __init__(self, config: ScoringConfig) -> None:
        codes = list(FeatureLayout.of(config).names)
        codes += [c for c in Prior(config).codes if c not in codes]  # the prior's reasons
        self.codes = tuple(codes)
        self._index = {code: i for i, code in enumerate(self.codes)}
        self.fingerprint = zlib.crc32("\n".join(self.codes).encode()) & 0xFF

    def encode(self, answer: StoredAnswer) -> bytes:
        body: list[int] = [
            self.fingerprint,
            round(answer.risk * RISK_UNITS),
            DECISION_CODES.index(answer.decision),
            answer.model_version,
        ]
        for code, value in answer.reasons:
            scale = _reason_scale(code)
            body += [self._index[code], round(display_round(code, value) * scale)]
        return bytes(msgpack.packb(body))

    def decode(self, data: bytes) -> StoredAnswer:
        try:
            body = msgpack.unpackb(data)
            fingerprint, risk, decision, version, *pairs = body
            if fingerprint != self.fingerprint:
                raise RecordError("stored under another configuration's reason codes")
            reasons = []
            for i in range(0, len(pairs), 2):
                code = self.codes[pairs[i]]
                reasons.append((code, pairs[i + 1] / _reason_scale(code)))
            return StoredAnswer(
                risk / RISK_UNITS, DECISION_CODES[decision], tuple(reasons), int(version)
            )
        except (ValueError, TypeError, IndexError, msgpack.ExtraData) as exc:
            if isinstance(exc, RecordError):
                raise
            raise RecordError(f"not a stored answer: {exc}") from exc


RISK_UNITS = 1_000_000
"""Answers give the risk to 6 decimals; stored answers keep it in millionths."""
DECISION_CODES = ("allow", "review", "deny")


def _reason_scale(code: str) -> float:
    return 100.0 if code == "amount.log" else 10.0
