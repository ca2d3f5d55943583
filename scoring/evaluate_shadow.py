"""Catch rates and the shadow comparison of emberscore's decisions with the rules in force.

An alert is a decision of review or deny. "Caught" means a labelled fraud that was alerted;
"missed" a labelled fraud that was allowed. As everywhere in evaluation, an event without a label
counts as not fraud (common practice, no source).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from scoring.evaluate_alerts import top_mask
from scoring.evaluate_ranking import BoolArray, FloatArray, as_flags, as_risk

DECISIONS = ("allow", "review", "deny")
UNKNOWN_DECISION = -1
_CODES = {name: code for code, name in enumerate(DECISIONS)}
Int8Array = npt.NDArray[np.int8]


def decision_codes(decisions: Sequence[str | None]) -> Int8Array:
    """Decision rank per event: allow 0, review 1, deny 2; missing or unknown text -1.

    Parameters
    ----------
    decisions
        Decision text per event (case and surrounding spaces ignored), or None where missing.

    Returns
    -------
    numpy.ndarray
        int8 codes. The rank doubles as the rules' "risk" when a 3-level decision is scored
        like a risk column.

    Examples
    --------
    >>> decision_codes(["deny", "Allow ", None, "review", "block"]).tolist()
    [2, 0, -1, 1, -1]
    """
    codes = [_CODES.get(d.strip().lower(), -1) if d is not None else -1 for d in decisions]
    return np.asarray(codes, dtype=np.int8)


def catch_rate(flagged: npt.ArrayLike, mask: npt.ArrayLike) -> float:
    """Share of the events selected by `mask` that are flagged; NaN when `mask` selects none.

    Parameters
    ----------
    flagged
        One flag per event, for example alerted.
    mask
        The events to look at, for example the fraud of one segment (then the result is that
        segment's catch rate).

    Returns
    -------
    float

    Examples
    --------
    >>> catch_rate([True, False, True, True], [True, True, True, False])
    0.6666666666666666
    """
    flags = np.asarray(flagged, dtype=np.bool_)
    selected = as_flags(mask, flags.shape[0], "mask")
    total = int(np.count_nonzero(selected))
    return int(np.count_nonzero(flags & selected)) / total if total else math.nan


@dataclass(frozen=True)
class SegmentCatch:
    """One segment's events, labelled fraud, fraud alerted, and catch rate (caught / fraud).

    Attributes
    ----------
    segment, events, fraud
        The segment's name, its events and its labelled fraud.
    caught
        Fraud alerted; fractional when alerts were given as weights (expected counts).
    catch_rate
        caught / fraud; NaN when the segment has no fraud.
    alerted_share
        Share of the segment's events alerted (expected share with weights): for a segment
        that is all attack, its catch rate whatever the labels; for a benign one, false alarms.

    Examples
    --------
    >>> segment_catch_rates([1, 0], [1, 1], ["web", "web"])[0].catch_rate
    0.5
    """

    segment: str
    events: int
    fraud: int
    caught: float
    catch_rate: float
    alerted_share: float = math.nan


def segment_catch_rates(
    flagged: npt.ArrayLike, is_fraud: npt.ArrayLike, segment: Sequence[str]
) -> list[SegmentCatch]:
    """Catch rate of fraud in each segment, segments in sorted order.

    Parameters
    ----------
    flagged
        A flag per event, or a weight in [0, 1] (the chance it is alerted, as from
        `alert_weights`), which makes the catches expected counts.
    is_fraud
        One fraud flag per event.
    segment
        The segment name of each event.

    Returns
    -------
    list of SegmentCatch

    Examples
    --------
    >>> rows = segment_catch_rates([1, 0, 1, 0], [1, 1, 1, 0], ["a", "a", "b", "b"])
    >>> [(r.segment, r.fraud, r.caught, r.catch_rate) for r in rows]
    [('a', 2, 1.0, 0.5), ('b', 1, 1.0, 1.0)]
    """
    fraud = as_flags(is_fraud, len(segment))
    weights = np.asarray(flagged, dtype=np.float64)
    if weights.shape != fraud.shape or not ((weights >= 0) & (weights <= 1)).all():
        raise ValueError(f"flagged must hold {fraud.size} flags or weights between 0 and 1")
    names, which = np.unique(np.asarray(segment, dtype=object), return_inverse=True)
    events = np.bincount(which, minlength=names.size)
    frauds = np.bincount(which, weights=fraud, minlength=names.size)
    caught = np.bincount(which, weights=fraud * weights, minlength=names.size)
    alerted = np.bincount(which, weights=weights, minlength=names.size)
    return [
        SegmentCatch(
            segment=str(name),
            events=int(events[i]),
            fraud=int(frauds[i]),
            caught=float(caught[i]),
            catch_rate=float(caught[i] / frauds[i]) if frauds[i] else math.nan,
            alerted_share=float(alerted[i] / events[i]),
        )
        for i, name in enumerate(names)
    ]


@dataclass(frozen=True)
class AmountSplit:
    """Sum of `amount` over labelled fraud: all of it, and what each side catches or misses.

    Attributes
    ----------
    fraud
        Amount of all labelled fraud.
    ours, rules, both, only_ours, only_rules, neither
        Amount of the fraud alerted by emberscore, by the rules, by both, by one side only,
        and by neither (missed by both).
    fraud_without_amount
        Fraud events whose amount is missing; they count as 0.

    Examples
    --------
    >>> split_catches([1], [0], [1], [12.5]).amount.only_ours
    12.5
    """

    fraud: float
    ours: float
    rules: float
    both: float
    only_ours: float
    only_rules: float
    neither: float
    fraud_without_amount: int


@dataclass(frozen=True)
class CatchSplit:
    """Labelled fraud split by who alerts it: emberscore ("ours"), the rules, both, neither.

    Attributes
    ----------
    fraud
        Labelled fraud events.
    ours, rules, both, only_ours, only_rules, neither
        How many of them emberscore alerts, the rules alert, both, one side only, neither.
    amount
        The same split in money, or None without amounts.

    Examples
    --------
    >>> split = split_catches([1, 0], [1, 1], [1, 1])
    >>> split.both, split.only_rules, split.amount is None
    (1, 1, True)
    """

    fraud: int
    ours: int
    rules: int
    both: int
    only_ours: int
    only_rules: int
    neither: int
    amount: AmountSplit | None


def _amount_split(
    ours: BoolArray, rules: BoolArray, fraud: BoolArray, amount: FloatArray
) -> AmountSplit:
    known = np.isfinite(amount)
    value = np.where(known, amount, 0.0)

    def total(mask: BoolArray) -> float:
        return float(value[mask & fraud].sum())

    return AmountSplit(
        fraud=total(fraud),
        ours=total(ours),
        rules=total(rules),
        both=total(ours & rules),
        only_ours=total(ours & ~rules),
        only_rules=total(rules & ~ours),
        neither=total(~ours & ~rules),
        fraud_without_amount=int(np.count_nonzero(fraud & ~known)),
    )


def split_catches(
    ours: npt.ArrayLike,
    rules: npt.ArrayLike,
    is_fraud: npt.ArrayLike,
    amount: npt.ArrayLike | None = None,
) -> CatchSplit:
    """Count labelled fraud alerted by emberscore (`ours`), by the rules, by both and by neither.

    Parameters
    ----------
    ours, rules
        Whether each event is alerted by emberscore, and by the rules.
    is_fraud
        One fraud flag per event.
    amount
        Optional amount per event (NaN where missing), for the money at stake.

    Returns
    -------
    CatchSplit
        Its `amount` is None when no amount was given or all are missing.

    Examples
    --------
    >>> s = split_catches([1, 1, 0, 0], [1, 0, 1, 0], [1, 1, 1, 1], [10.0, 5.0, 2.0, float("nan")])
    >>> s.both, s.only_ours, s.only_rules, s.neither, s.amount.neither
    (1, 1, 1, 1, 0.0)
    """
    fraud = as_flags(is_fraud, np.asarray(ours).shape[0])
    mine = as_flags(ours, fraud.size, "ours")
    theirs = as_flags(rules, fraud.size, "rules")
    money = None
    if amount is not None:
        values = np.asarray(amount, dtype=np.float64)
        if values.shape != fraud.shape:
            raise ValueError(f"amount must have {fraud.size} values, got shape {values.shape}")
        money = _amount_split(mine, theirs, fraud, values) if np.isfinite(values).any() else None

    def count(mask: BoolArray) -> int:
        return int(np.count_nonzero(mask & fraud))

    return CatchSplit(
        fraud=count(fraud),
        ours=count(mine),
        rules=count(theirs),
        both=count(mine & theirs),
        only_ours=count(mine & ~theirs),
        only_rules=count(theirs & ~mine),
        neither=count(~mine & ~theirs),
        amount=money,
    )


@dataclass(frozen=True)
class ShadowComparison:
    """emberscore's decisions beside the rules' on the same events.

    Attributes
    ----------
    events, excluded
        Events compared, and events left out because either decision was missing or unknown.
    agreement
        3 x 3 counts: ``agreement[i, j]`` events emberscore decided ``DECISIONS[i]`` and the
        rules ``DECISIONS[j]``.
    alerts_ours, alerts_rules, deny_ours, deny_rules
        Alerts (review or deny) and denials on each side.
    by_decision
        Labelled fraud split by each side's own decisions.
    same_volume_threshold, same_volume_alerts, same_volume
        emberscore alerting its highest-risk events, as many as the rules alert (ties at the
        cut included, so it may be a few more): its threshold, its alert count, and the fraud
        split against the rules' decisions.

    Examples
    --------
    >>> c = compare_decisions([1, 0], [1, 1], [1, 0], risk=[0.9, 0.2])
    >>> c.agreement_rate, c.same_volume.ours
    (0.5, 1)
    """

    events: int
    excluded: int
    agreement: npt.NDArray[np.int64]
    alerts_ours: int
    alerts_rules: int
    deny_ours: int
    deny_rules: int
    by_decision: CatchSplit
    same_volume_threshold: float
    same_volume_alerts: int
    same_volume: CatchSplit

    @property
    def agreement_rate(self) -> float:
        """Share of compared events on which both sides decided the same."""
        return float(np.trace(self.agreement) / self.events) if self.events else math.nan


def compare_decisions(
    ours: npt.ArrayLike,
    rules: npt.ArrayLike,
    is_fraud: npt.ArrayLike,
    *,
    risk: npt.ArrayLike,
    amount: npt.ArrayLike | None = None,
) -> ShadowComparison:
    """Compare emberscore's decisions with the rules' on the same events.

    Parameters
    ----------
    ours, rules
        Decision codes per event (`decision_codes`): emberscore's and the rules'. Rows where
        either is -1 are left out and counted.
    is_fraud
        One fraud flag per event (unlabelled events passed as not fraud).
    risk
        emberscore's risk per event, to alert at the rules' volume.
    amount
        Optional amount per event (NaN where missing).

    Returns
    -------
    ShadowComparison

    Examples
    --------
    >>> c = compare_decisions([2, 0, 1, 0], [1, 1, 0, 0], [1, 1, 0, 0], risk=[0.9, 0.6, 0.7, 0.1])
    >>> c.agreement.tolist(), c.alerts_ours, c.alerts_rules
    ([[1, 1, 0], [1, 0, 0], [0, 1, 0]], 2, 2)
    >>> c.by_decision.only_ours, c.by_decision.only_rules, c.same_volume.ours
    (0, 1, 1)
    """
    mine = np.asarray(ours, dtype=np.int64)
    theirs = np.asarray(rules, dtype=np.int64)
    values = as_risk(risk)
    if not mine.shape == theirs.shape == values.shape:
        raise ValueError("ours, rules and risk must have the same length")
    keep = (mine >= 0) & (mine <= 2) & (theirs >= 0) & (theirs <= 2)
    fraud = as_flags(is_fraud, mine.size)[keep]
    money = None if amount is None else np.asarray(amount, dtype=np.float64)[keep]
    mine, theirs, values = mine[keep], theirs[keep], values[keep]
    matrix = np.bincount(mine * 3 + theirs, minlength=9).reshape(3, 3).astype(np.int64)
    alert_ours, alert_rules = mine >= 1, theirs >= 1
    same = top_mask(values, int(np.count_nonzero(alert_rules)))
    return ShadowComparison(
        events=int(mine.size),
        excluded=int(np.count_nonzero(~keep)),
        agreement=matrix,
        alerts_ours=int(np.count_nonzero(alert_ours)),
        alerts_rules=int(np.count_nonzero(alert_rules)),
        deny_ours=int(np.count_nonzero(mine == 2)),
        deny_rules=int(np.count_nonzero(theirs == 2)),
        by_decision=split_catches(alert_ours, alert_rules, fraud, money),
        same_volume_threshold=float(values[same].min()) if same.any() else math.inf,
        same_volume_alerts=int(np.count_nonzero(same)),
        same_volume=split_catches(same, alert_rules, fraud, money),
    )
