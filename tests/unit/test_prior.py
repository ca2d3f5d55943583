"""The transparent prior (`scoring.prior.Prior`): one definition, two evaluations, its points.

References: the signal thresholds and point values are the project's judgement (common practice,
no source), documented in the docstrings of `scoring.prior`; the conformance table
``tests/data/prior_signals.csv`` quotes, per row, the docstring or the line of the signal it
checks. The scalar/vector agreement is a property test (hypothesis) of the "write once, run on
numbers and on numpy columns" design; its tolerance of 1e-12 (relative) covers `math` and numpy
rounding ``expm1``/``log2``/``exp`` differently in the last bit.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.config import ScoringConfig
from scoring.features import BINARY, LOG, FeatureLayout
from scoring.prior import FLAG_POINTS, Prior

DATA = Path(__file__).parent.parent / "data"
CFG = ScoringConfig()
PRIOR = Prior(CFG)
LAYOUT = FeatureLayout.of(CFG)
N = len(LAYOUT.names)


def _table() -> list[dict[str, str]]:
    with (DATA / "prior_signals.csv").open(newline="") as f:
        return list(csv.DictReader(f))


def _value(spec: str) -> float:
    """``count:4`` -> log1p(4) (log counts), ``days:3`` -> log1p(3) (log ages), ``raw:x`` -> x."""
    kind, _, number = spec.partition(":")
    if kind in ("count", "days"):
        return math.log1p(float(number))
    assert kind == "raw", spec
    return float(number)


def _vector(features: str) -> list[float]:
    x = [0.0] * N
    for item in features.split(";"):
        name, _, spec = item.partition("=")
        x[LAYOUT.index(name)] = _value(spec)
    return x


@pytest.mark.parametrize("row", _table(), ids=lambda r: r["case"])
def test_documented_points(row: dict[str, str]) -> None:
    x = _vector(row["features"])
    points = {e.code: e.points for e in PRIOR.evidence(x)}
    expected = float(row["expected_points"])
    assert points.get(row["code"], 0.0) == pytest.approx(expected, abs=1e-12), row["source"]
    # the vector path gives the same number for the same row
    matrix = PRIOR.points_matrix(np.array([x]))[0]
    if row["code"] in PRIOR.codes:
        column = PRIOR.codes.index(row["code"])
        assert matrix[column] == pytest.approx(expected, abs=1e-12)
    else:  # a flag without points is no code of the prior at all
        assert expected == 0.0
        assert matrix.sum() == 0.0


def test_every_table_code_is_a_prior_code() -> None:
    assert {r["code"] for r in _table()} - {"ip.v6"} <= set(PRIOR.codes)
    assert len(PRIOR.codes) == len(set(PRIOR.codes))  # one column per code
    assert {code for code, _ in FLAG_POINTS.values()} <= set(PRIOR.codes)


def test_no_evidence_on_an_event_with_nothing_known() -> None:
    assert PRIOR.evidence([0.0] * N) == []
    assert PRIOR.logit([0.0] * N) == CFG.base_logit


# Feature values as the reader produces them: log counts and ages (often right at a signal's
# threshold), 0/1 flags, signed log-odds excesses. Hypothesis draws the seed and the share of
# threshold values; numpy fills the matrix (drawing 87 columns one by one would be slow).
THRESHOLD_LOGS = np.log1p([0, 1, 2, 3, 4, 5, 8, 16, 32, 64, 1000])
THRESHOLD_SIGNED = np.array([-1.0, 0.0, 0.3, 1.0, 1.25, 5.0])
SCALES = np.array(LAYOUT.scales)


@st.composite
def matrices(draw: st.DrawFn) -> np.ndarray:
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    rows = draw(st.integers(1, 8))
    at_threshold = draw(st.floats(0.0, 1.0))
    shape = (rows, N)
    pick = rng.random(shape) < at_threshold
    log = np.where(pick, rng.choice(THRESHOLD_LOGS, shape), rng.uniform(0.0, 9.0, shape))
    signed = np.where(pick, rng.choice(THRESHOLD_SIGNED, shape), rng.uniform(-6.0, 12.0, shape))
    binary = (rng.random(shape) < 0.5).astype(np.float64)
    return np.where(SCALES == LOG, log, np.where(SCALES == BINARY, binary, signed))


@given(matrices())
def test_scalar_and_vector_paths_agree(features: np.ndarray) -> None:
    """Property: for every row, code by code, `points_matrix` equals the scalar `evidence`
    points (0 for a code without evidence, so never negative) within 1e-12, and
    `evaluate_matrix` quotes the same value; so the row sums equal `points`.

    Exact equality does not hold: numpy's array ``log2``/``expm1`` and `math`'s differ in the
    last bits, so right at a threshold (2 accounts a day on one device) one path gives 0 points
    and the other 3e-16. Such crumbs are never quoted (a reason needs 0.05 log-odds).
    """
    points, values = PRIOR.evaluate_matrix(features)
    assert points.shape == values.shape == (features.shape[0], len(PRIOR.codes))
    assert np.array_equal(points, PRIOR.points_matrix(features))
    assert np.all(points >= 0.0)
    for r, row in enumerate(features.tolist()):
        evidence = {e.code: e for e in PRIOR.evidence(row)}
        for c, code in enumerate(PRIOR.codes):
            e = evidence.get(code)
            scalar = 0.0 if e is None else e.points
            assert points[r, c] == pytest.approx(scalar, rel=1e-12, abs=1e-12), code
            if e is not None and e.points > 1e-9:
                assert values[r, c] == pytest.approx(e.value, rel=1e-12, abs=1e-15), code
        assert points[r].sum() == pytest.approx(PRIOR.points(row), rel=1e-12, abs=1e-12)


@given(matrices())
def test_evidence_is_positive_and_sorted_by_points(features: np.ndarray) -> None:
    for row in features.tolist():
        evidence = PRIOR.evidence(row)
        assert all(e.points > 0.0 for e in evidence)
        assert [e.points for e in evidence] == sorted((e.points for e in evidence), reverse=True)
        assert PRIOR.logit(row) == pytest.approx(
            CFG.base_logit + sum(e.points for e in evidence), abs=1e-12
        )


def test_signals_read_only_features_of_the_layout() -> None:
    """A configuration without some features (here: no fan-out, one kind) gives no evidence
    from them, on both paths, instead of failing."""
    cfg = ScoringConfig(kinds=("account",), label_kinds=("account",), fanout=())
    prior = Prior(cfg)
    layout = FeatureLayout.of(cfg)
    x = [0.0] * len(layout.names)
    x[layout.index("account.n_1h")] = math.log1p(5)
    assert [e.code for e in prior.evidence(x)] == ["account.velocity"]
    assert prior.points_matrix(np.array([x])).sum() == pytest.approx(0.8, abs=1e-12)
