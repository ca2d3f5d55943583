"""Model snapshots (`scoring.fusion.ModelSnapshot`, `OnlineModel`) against river itself.

Reference: river (the pinned 0.26.1), used for real. `OnlineModel.raw_logit` asks river's
``StandardScaler.transform_one`` and ``LogisticRegression._raw_dot_one`` for the log-odds; the
snapshot recomputes them from plain numbers with numpy and must agree.

Why 1e-12 (relative to the size of the terms, ``1 + |b| + sum |w_i z_i|``): both sides compute
``w_i (x_i - mean_i) / std_i`` per input, river dividing by ``var ** 0.5`` and the snapshot
multiplying by ``1 / sqrt(var)``, a difference of a few units of 1.1e-16 per term, then add the
terms in different orders (a dict walk against a numpy dot product), at most ``d * u`` of the sum
of magnitudes for ``d`` inputs: under 1e-14 for the 88 inputs of the default layout.
"""

from __future__ import annotations

import contextlib
import math

import msgpack
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.config import ScoringConfig
from scoring.features import FeatureLayout
from scoring.fusion import (
    PRIOR_FEATURE,
    SNAPSHOT_FORMAT,
    ModelSnapshot,
    OnlineModel,
    SnapshotError,
    model_features,
)

REL = 1e-12
FEATURES = model_features(FeatureLayout.of(ScoringConfig()))


def random_inputs(rng: np.random.Generator, d: int) -> list[float]:
    """Mixed scales, as the real features are: log counts, yes/no flags, signed log-odds. The
    middle and last inputs are constant, like a flag never raised: their variance stays 0 (the
    scaled input is 0) and their weight stays exactly 0."""
    x = np.empty(d)
    x[0::3] = rng.exponential(1.5, size=len(x[0::3]))
    x[1::3] = rng.integers(0, 2, size=len(x[1::3]))
    x[2::3] = rng.normal(0.0, 2.0, size=len(x[2::3]))
    x[d // 2] = x[-1] = 0.0
    return [float(v) for v in x]


def trained(
    features: tuple[str, ...], seed: int, n: int
) -> tuple[OnlineModel, np.random.Generator]:
    rng = np.random.default_rng(seed)
    model = OnlineModel(features, learning_rate=0.05)
    weights = rng.normal(size=len(features))
    for _ in range(n):
        x = random_inputs(rng, len(features))
        model.learn_one(x, bool(rng.random() < 1 / (1 + math.exp(-float(weights @ x) / 4))))
    return model, rng


def assert_close_to_river(snapshot: ModelSnapshot, model: OnlineModel, x: list[float]) -> None:
    terms = snapshot.contributions(x)
    scale = 1.0 + abs(snapshot.intercept) + float(np.abs(terms).sum())
    assert abs(snapshot.logit(x) - model.raw_logit(x)) <= REL * scale
    assert snapshot.logit(x) == pytest.approx(
        float(terms.sum()) + snapshot.intercept, abs=REL * scale
    )


@pytest.mark.parametrize("seed", range(4))
def test_snapshot_logit_equals_river_on_the_default_layout(seed: int) -> None:
    model, rng = trained(FEATURES, seed, n=300)
    snapshot = model.snapshot()
    assert snapshot.features[-1] == PRIOR_FEATURE
    for _ in range(50):
        assert_close_to_river(snapshot, model, random_inputs(rng, len(FEATURES)))


@given(st.integers(0, 2**32 - 1), st.integers(2, 30), st.integers(0, 120))
def test_snapshot_logit_equals_river_after_random_learning(seed: int, d: int, n: int) -> None:
    features = tuple(f"f{i}" for i in range(d))
    model, rng = trained(features, seed, n)
    snapshot = model.snapshot()
    for _ in range(10):
        assert_close_to_river(snapshot, model, random_inputs(rng, d))


def test_empty_snapshot_predicts_even_odds() -> None:
    """Regression: a model that has learned nothing can be published (river holds no weights
    yet; `OnlineModel.snapshot` once raised KeyError here)."""
    model = OnlineModel(("a", "b"))
    assert model.snapshot().logit([3.0, -1.0]) == 0.0 == model.raw_logit([3.0, -1.0])
    assert ModelSnapshot.empty(("a", "b")).logit([3.0, -1.0]) == 0.0


finite = st.floats(allow_nan=False, allow_infinity=False)


@st.composite
def snapshots(draw: st.DrawFn) -> ModelSnapshot:
    d = draw(st.integers(0, 12))
    vector = st.lists(finite, min_size=d, max_size=d).map(tuple)
    return ModelSnapshot(
        version=draw(st.integers(0, 2**63 - 1)),
        features=tuple(draw(st.lists(st.text(max_size=20), min_size=d, max_size=d))),
        counts=draw(vector),
        means=draw(vector),
        variances=draw(vector),
        weights=draw(vector),
        intercept=draw(finite),
        positives=draw(st.integers(0, 2**63 - 1)),
        negatives=draw(st.integers(0, 2**63 - 1)),
    )


@given(snapshots())
def test_bytes_round_trip(snapshot: ModelSnapshot) -> None:
    assert ModelSnapshot.from_bytes(snapshot.to_bytes()) == snapshot


def test_learned_snapshot_round_trips_and_predicts_the_same() -> None:
    model, rng = trained(FEATURES, seed=9, n=200)
    snapshot = model.snapshot()
    back = ModelSnapshot.from_bytes(snapshot.to_bytes())
    assert back == snapshot
    x = random_inputs(rng, len(FEATURES))
    assert back.logit(x) == snapshot.logit(x)


@pytest.mark.parametrize("seed", range(3))
def test_restore_predicts_and_keeps_learning_identically(seed: int) -> None:
    """Restored river objects predict as the original and, fed the same further examples, stay
    identical: learning continues exactly where the snapshot stopped."""
    original, rng = trained(FEATURES, seed, n=150)
    snapshot = original.snapshot()
    restored = OnlineModel.restore(snapshot, learning_rate=0.05)
    # Regression: `restore` leaves zero weights unset in river, and publishing the restored model
    # before it learned anything once raised KeyError.
    assert restored.snapshot() == original.snapshot()
    probes = [random_inputs(rng, len(FEATURES)) for _ in range(20)]
    assert [restored.raw_logit(x) for x in probes] == [original.raw_logit(x) for x in probes]
    for _ in range(150):
        x = random_inputs(rng, len(FEATURES))
        is_fraud = bool(rng.random() < 0.3)
        original.learn_one(x, is_fraud)
        restored.learn_one(x, is_fraud)
    assert restored.snapshot() == original.snapshot()
    assert [restored.raw_logit(x) for x in probes] == [original.raw_logit(x) for x in probes]


def _payload(**changes: object) -> bytes:
    payload: dict[str, object] = {
        "format": SNAPSHOT_FORMAT,
        "version": 1,
        "features": ["a", "b"],
        "counts": [1.0, 1.0],
        "means": [0.0, 0.0],
        "variances": [1.0, 1.0],
        "weights": [0.5, -0.5],
        "intercept": 0.0,
        "positives": 1,
        "negatives": 1,
    }
    payload.update(changes)
    return bytes(msgpack.packb({k: v for k, v in payload.items() if v is not None}))


def test_payload_helper_is_valid() -> None:
    assert ModelSnapshot.from_bytes(_payload()).features == ("a", "b")


BAD = {
    "empty": b"",
    "never-used byte": b"\xc1",
    "not msgpack": b"snapshot, honest",
    "a list": msgpack.packb([1, 2, 3]),
    "a number": msgpack.packb(7),
    "a string": msgpack.packb("weights"),
    "unknown format": _payload(format=2),
    "no format": _payload(format=None),
    "missing weights": _payload(weights=None),
    "short vector": _payload(means=[0.0]),
    "text in a vector": _payload(counts=["one", 1.0]),
    "features not a list": _payload(features=3),
    "infinite version": _payload(version=float("inf")),
    "trailing bytes": _payload() + b"\x00",
}


@pytest.mark.parametrize("data", BAD.values(), ids=BAD.keys())
def test_bad_bytes_raise_snapshot_error(data: bytes) -> None:
    with pytest.raises(SnapshotError, match="snapshot"):
        ModelSnapshot.from_bytes(data)


@given(st.binary(max_size=200))
def test_arbitrary_bytes_parse_or_raise_snapshot_error(data: bytes) -> None:
    with contextlib.suppress(SnapshotError):
        ModelSnapshot.from_bytes(data)
