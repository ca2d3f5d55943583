"""Compact event records and stored answers (`scoring.logrecord`).

The reference for the features is the codec's own statement of what the learner sees,
`RecordCodec.quantised`, and the quantiser's step: codes are ``round(16 x)`` (``+ 128`` on the
signed scale), so inside the ranges a value comes back within half a step, 1/32. Multiplying by 16
and dividing by 16 are exact in binary floating point, so that bound holds exactly.
"""

from __future__ import annotations

import contextlib

import msgpack
import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.config import ScoringConfig
from scoring.features import BINARY, LOG, SIGNED
from scoring.logrecord import (
    AnswerCodec,
    EventRecord,
    RecordCodec,
    RecordError,
    StoredAnswer,
    dequantise,
    quantise,
)
from scoring.reasons import describe

CFG = ScoringConfig()
CODEC = RecordCodec(CFG)
SCALES = CODEC.layout.scales
LOG_MAX = 255 / 16
SIGNED_MIN, SIGNED_MAX = -128 / 16, 127 / 16
HALF_STEP = 1 / 32


def in_range(scale: str) -> st.SearchStrategy[float]:
    if scale == BINARY:
        return st.sampled_from([0.0, 1.0])
    low, high = (0.0, LOG_MAX) if scale == LOG else (SIGNED_MIN, SIGNED_MAX)
    return st.floats(min_value=low, max_value=high, allow_nan=False)


feature_vectors = st.tuples(*[in_range(s) for s in SCALES])
digests = st.binary(min_size=8, max_size=8)
identifier_sets = st.lists(
    st.tuples(st.sampled_from(CFG.label_kinds), digests), unique_by=lambda p: p[0]
).map(tuple)
records = st.builds(
    EventRecord,
    ts_s=st.floats(min_value=0.0, max_value=4_102_444_800.0),  # until the year 2100
    identifiers=identifier_sets,
    features=st.one_of(st.none(), feature_vectors),
    risk=st.floats(min_value=0.0, max_value=1.0),
    model_version=st.integers(0, 2**32 - 1),
)


def test_quantiser_by_hand() -> None:
    """Codes worked by hand: step 1/16, signed offset 128, clipped to one byte."""
    cases = [(2.5, LOG, 40), (0.03, LOG, 0), (0.04, LOG, 1), (99.0, LOG, 255), (-1.0, LOG, 0)]
    cases += [(-1.0, SIGNED, 112), (0.0, SIGNED, 128), (-9.0, SIGNED, 0), (9.0, SIGNED, 255)]
    cases += [(1.0, BINARY, 1), (0.0, BINARY, 0)]
    for value, scale, code in cases:
        assert quantise(value, scale) == code, (value, scale)
    assert [dequantise(c, s) for _, s, c in cases[:2]] == [2.5, 0.0]


@given(feature_vectors)
def test_features_round_trip_to_their_quantised_values(x: tuple[float, ...]) -> None:
    """Decoded features equal `RecordCodec.quantised` of the input, within 1/32 of it."""
    record = EventRecord(1_790_000_000.0, (), x, 0.5, 1)
    back = CODEC.decode(CODEC.encode(record))
    assert back.features == CODEC.quantised(x)
    assert back.features is not None
    assert all(abs(b - v) <= HALF_STEP for b, v in zip(back.features, x, strict=True))
    assert CODEC.quantised(back.features) == back.features  # quantising twice changes nothing


@given(feature_vectors)
def test_vectorised_codes_match_the_scalar_quantiser(x: tuple[float, ...]) -> None:
    import numpy as np

    codes = CODEC.codes(np.asarray(x))
    assert [int(c) for c in codes] == [quantise(v, s) for v, s in zip(x, SCALES, strict=True)]


def test_out_of_range_features_are_clipped() -> None:
    x = [100.0 if s != BINARY else 1.0 for s in SCALES]
    back = CODEC.decode(CODEC.encode(EventRecord(0.0, (), tuple(x), 0.0, 0)))
    assert back.features is not None
    assert max(back.features) == LOG_MAX
    assert {v for v, s in zip(back.features, SCALES, strict=True) if s == SIGNED} == {SIGNED_MAX}


@given(records)
def test_record_round_trip(record: EventRecord) -> None:
    """Identifiers (label kinds, in configuration order), time to the second, risk in 16 bits."""
    back = CODEC.decode(CODEC.encode(record))
    order = {kind: i for i, kind in enumerate(CFG.label_kinds)}
    assert back.identifiers == tuple(sorted(record.identifiers, key=lambda p: order[p[0]]))
    assert back.ts_s == round(record.ts_s)
    assert abs(back.risk - record.risk) <= 0.5 / 65535
    assert back.model_version == record.model_version
    expected = None if record.features is None else CODEC.quantised(record.features)
    assert back.features == expected


def test_only_label_kinds_keep_their_digests() -> None:
    """Documented: kinds without label statistics (ip, phone_prefix) are not kept."""
    ids = (("ip", b"i" * 8), ("device", b"d" * 8), ("phone_prefix", b"q" * 8))
    back = CODEC.decode(CODEC.encode(EventRecord(0.0, ids, None, 0.0, 0)))
    assert back.identifiers == (("device", b"d" * 8),)


def largest_realistic_record() -> EventRecord:
    """Every label kind present, every graded feature away from its default at the widest code,
    every yes/no feature set, risk 1, a time near 2100 and a 32-bit model version."""
    x = tuple(1.0 if s == BINARY else (LOG_MAX if s == LOG else SIGNED_MAX) for s in SCALES)
    ids = tuple((kind, bytes([255 - i]) * 8) for i, kind in enumerate(CFG.label_kinds))
    return EventRecord(4_102_444_800.0, ids, x, 1.0, 2**32 - 1)


def test_size_bound() -> None:
    """The largest realistic record stays under 150 bytes (what the README sizes memory with)."""
    assert len(CODEC.encode(largest_realistic_record())) < 150


@given(records)
def test_no_record_is_larger_than_the_largest(record: EventRecord) -> None:
    assert len(CODEC.encode(record)) <= len(CODEC.encode(largest_realistic_record()))


def test_wrong_feature_count_is_refused() -> None:
    with pytest.raises(RecordError, match="expected 87 features"):
        CODEC.encode(EventRecord(0.0, (), (0.0,) * 86, 0.0, 0))


GARBAGE = [
    b"",
    b"\xc1",  # a byte msgpack never uses
    b"not a record",
    msgpack.packb([1, 2, 3, 4, 5, 6, 7]),
    msgpack.packb("abcdefg"),
    msgpack.packb(b"1234567"),
    msgpack.packb({"ts": 1}),
    msgpack.packb([0, 1, b"", None, b"", 0, 0]),  # a kind announced, no digest
    msgpack.packb([0, 1 << 20, b"", None, b"", 0, 0]),  # a kind this layout does not have
    msgpack.packb([0, 0, b"", b"\x01", b"", 0, 0]),  # feature mask of the wrong size
    msgpack.packb([0, 0, b"", b"\x01" + bytes(10), b"", 0, 0]),  # a graded code missing
    msgpack.packb([0, 0, b"", None, b"", 70_000, 0]),  # risk beyond 16 bits
    msgpack.packb([0.5, 0, b"", None, b"", 0, 0]),  # time not whole seconds
]


@pytest.mark.parametrize("data", GARBAGE)
def test_garbage_bytes_raise_record_error(data: bytes) -> None:
    with pytest.raises(RecordError, match="not an event record"):
        CODEC.decode(data)


def test_truncated_or_extended_records_raise_record_error() -> None:
    data = CODEC.encode(largest_realistic_record())
    for end in range(len(data)):
        with pytest.raises(RecordError):
            CODEC.decode(data[:end])
    with pytest.raises(RecordError):
        CODEC.decode(data + b"\x00")


def test_record_of_another_layout_raises_record_error() -> None:
    other = RecordCodec(ScoringConfig(half_lives_s=(3_600.0, 2_592_000.0)))
    x = tuple(1.0 for _ in other.layout.names)
    with pytest.raises(RecordError, match="this layout"):
        CODEC.decode(other.encode(EventRecord(0.0, (), x, 0.0, 0)))


@given(st.binary(max_size=200))
def test_arbitrary_bytes_decode_or_raise_record_error(data: bytes) -> None:
    """Never another exception type: a record either decodes or raises `RecordError`."""
    with contextlib.suppress(RecordError):
        CODEC.decode(data)
    with contextlib.suppress(RecordError):
        ANSWERS.decode(data)


ANSWERS = AnswerCodec(ScoringConfig())
answers = st.builds(
    StoredAnswer,
    risk=st.floats(min_value=0.0, max_value=1.0),
    decision=st.sampled_from(["allow", "review", "deny"]),
    reasons=st.lists(
        st.tuples(st.sampled_from(ANSWERS.codes), st.floats(0.0, 1e6)), max_size=3
    ).map(tuple),
    model_version=st.integers(0, 2**63 - 1),
)


@given(answers)
def test_stored_answer_round_trip(answer: StoredAnswer) -> None:
    """Round trip to the precision answers are given in: risk to 6 decimals, each reason's
    number to the grid its words show (`scoring.reasons.display_round`)."""
    back = ANSWERS.decode(ANSWERS.encode(answer))
    assert back.decision == answer.decision
    assert back.model_version == answer.model_version
    assert back.risk == round(answer.risk * 1_000_000) / 1_000_000
    assert [c for c, _ in back.reasons] == [c for c, _ in answer.reasons]
    for (code, value), (_, shown) in zip(answer.reasons, back.reasons, strict=True):
        assert describe(code, value) == describe(code, shown)


@given(answers)
def test_stored_answer_is_small(answer: StoredAnswer) -> None:
    """Small enough for Redis's embedded-string encoding (44 bytes) with three reasons."""
    assert len(ANSWERS.encode(answer)) <= 44


def test_answer_of_another_configuration_is_refused() -> None:
    other = AnswerCodec(ScoringConfig(half_lives_s=(3_600.0, 2_592_000.0)))
    data = other.encode(StoredAnswer(0.5, "review", (), 1))
    with pytest.raises(RecordError, match="another configuration"):
        ANSWERS.decode(data)


@pytest.mark.parametrize(
    "data", [b"", b"\xc1", msgpack.packb([1, 2]), msgpack.packb(7), msgpack.packb([0.1, "x", 5, 1])]
)
def test_garbage_stored_answer_raises_record_error(data: bytes) -> None:
    with pytest.raises(RecordError):
        ANSWERS.decode(data)
