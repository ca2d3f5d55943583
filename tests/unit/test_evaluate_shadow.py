"""Shadow comparison and catch rates, checked against scikit-learn's confusion_matrix (the
reference for the agreement matrix) and against brute-force loops over events."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import confusion_matrix

from scoring.evaluate import (
    DECISIONS,
    catch_rate,
    compare_decisions,
    decision_codes,
    segment_catch_rates,
    split_catches,
)


def _shadow_data(seed: int, n: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    is_fraud = rng.random(n) < 0.05
    risk = np.clip(rng.normal(0.2 + 0.4 * is_fraud, 0.15), 0, 1)
    ours = np.digitize(risk, [0.45, 0.7]).astype(np.int8)
    rules = np.where(rng.random(n) < 0.03 + 0.3 * is_fraud, rng.integers(1, 3, n), 0)
    amount = np.where(rng.random(n) < 0.9, np.round(rng.gamma(2, 40, n), 2), np.nan)
    return {"ours": ours, "rules": rules.astype(np.int8), "fraud": is_fraud, "risk": risk,
            "amount": amount}  # fmt: skip


def test_decision_codes() -> None:
    codes = decision_codes(["allow", "review", "deny", None, "", " DENY", "later"])
    assert codes.tolist() == [0, 1, 2, -1, -1, 2, -1]
    assert DECISIONS == ("allow", "review", "deny")


@pytest.mark.parametrize("seed", range(4))
def test_agreement_matrix_equals_sklearn_confusion_matrix(seed: int) -> None:
    """Reference: sklearn.metrics.confusion_matrix(y_true=ours, y_pred=rules, labels=[0, 1, 2]),
    rows emberscore's decision, columns the rules'."""
    data = _shadow_data(seed, 3000)
    result = compare_decisions(data["ours"], data["rules"], data["fraud"], risk=data["risk"])
    expected = confusion_matrix(data["ours"], data["rules"], labels=[0, 1, 2])
    np.testing.assert_array_equal(result.agreement, expected)
    assert result.agreement_rate == pytest.approx(np.mean(data["ours"] == data["rules"]))


@pytest.mark.parametrize("seed", range(4))
def test_catch_split_brute_force(seed: int) -> None:
    """Reference: brute force, one event at a time."""
    data = _shadow_data(seed, 2000)
    result = compare_decisions(
        data["ours"], data["rules"], data["fraud"], risk=data["risk"], amount=data["amount"]
    )
    tally = dict.fromkeys(("ours", "rules", "both", "only_ours", "only_rules", "neither"), 0)
    money = dict.fromkeys(tally, 0.0)
    for o, r, f, a in zip(data["ours"], data["rules"], data["fraud"], data["amount"], strict=True):
        if not f:
            continue
        a = 0.0 if math.isnan(a) else a
        kinds = {"ours": o > 0, "rules": r > 0, "both": o > 0 and r > 0}
        kinds |= {"only_ours": o > 0 and r == 0, "only_rules": r > 0 and o == 0}
        kinds["neither"] = o == 0 and r == 0
        for kind, hit in kinds.items():
            tally[kind] += int(hit)
            money[kind] += a if hit else 0.0
    split = result.by_decision
    assert {k: getattr(split, k) for k in tally} == tally
    assert split.amount is not None
    for kind, total in money.items():
        assert getattr(split.amount, kind) == pytest.approx(total)
    assert split.fraud == data["fraud"].sum()
    assert split.amount.fraud_without_amount == np.sum(data["fraud"] & np.isnan(data["amount"]))


def test_same_volume_uses_the_rules_alert_count() -> None:
    """Reference: brute force, sorting by risk and taking as many events as the rules alert."""
    data = _shadow_data(9, 5000)
    result = compare_decisions(data["ours"], data["rules"], data["fraud"], risk=data["risk"])
    k = int(np.sum(data["rules"] > 0))
    top = np.argsort(-data["risk"])[:k]
    assert result.alerts_rules == k
    assert result.same_volume_alerts == k  # continuous risk: no tie at the cut
    assert result.same_volume.ours == data["fraud"][top].sum()
    assert result.same_volume_threshold == data["risk"][top].min()
    flagged = np.zeros(5000, bool)
    flagged[top] = True
    caught_rules = (data["rules"] > 0) & data["fraud"]
    assert result.same_volume.only_ours == np.sum(flagged & data["fraud"] & ~caught_rules)


def test_unknown_decisions_are_excluded_and_counted() -> None:
    ours = decision_codes(["deny", "allow", None, "review"])
    rules = decision_codes(["deny", None, "allow", "review"])
    result = compare_decisions(ours, rules, [1, 1, 1, 0], risk=[0.9, 0.1, 0.2, 0.6])
    assert (result.events, result.excluded) == (2, 2)
    assert result.agreement_rate == 1.0
    assert result.by_decision.fraud == 1


def test_no_amounts_gives_no_amount_split() -> None:
    split = split_catches([1, 0], [0, 1], [1, 1], [float("nan"), float("nan")])
    assert split.amount is None
    assert split_catches([1, 0], [0, 1], [1, 1]).amount is None


def test_catch_rate_empty_mask_is_nan() -> None:
    assert math.isnan(catch_rate([True, False], [False, False]))
    assert catch_rate([True, False, True], [True, True, True]) == pytest.approx(2 / 3)


@settings(max_examples=150, deadline=None)
@given(
    rows=st.lists(
        st.tuples(st.sampled_from("abc"), st.booleans(), st.booleans()), min_size=1, max_size=50
    )
)
def test_segment_catch_rates_brute_force(rows: list[tuple[str, bool, bool]]) -> None:
    """Reference: brute force, a filter per segment; every segment's fraud is split exactly."""
    segment = [s for s, _, _ in rows]
    fraud = np.array([f for _, f, _ in rows])
    flagged = np.array([a for _, _, a in rows])
    result = segment_catch_rates(flagged, fraud, segment)
    assert [r.segment for r in result] == sorted(set(segment))
    for row in result:
        members = np.array([s == row.segment for s in segment])
        assert row.events == members.sum()
        assert row.fraud == (members & fraud).sum()
        assert row.caught == (members & fraud & flagged).sum()
        expected = catch_rate(flagged, members & fraud)
        assert row.catch_rate == pytest.approx(expected, nan_ok=True)
    assert sum(r.fraud for r in result) == fraud.sum()
