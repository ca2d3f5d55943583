"""Ranking metrics on a risk column against fraud outcomes.

Every function takes `risk` (higher means more likely fraud) and `is_fraud` (one flag per event)
as plain arrays and returns plain values. An event without a label is passed as not fraud: that is
common practice for fraud evaluation (no source), and it makes every figure here a lower bound on
precision, since unconfirmed fraud counts against the score. Figures that are undefined (a recall
with no fraud, a precision with no alert, an AUC with one class) are NaN, never an exception.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
IntArray = npt.NDArray[np.int64]


def as_risk(risk: npt.ArrayLike, name: str = "risk") -> FloatArray:
    """Check and convert a risk column: one dimension, finite numbers.

    Parameters
    ----------
    risk
        One number per event.
    name
        The column's name, for the error message.

    Returns
    -------
    numpy.ndarray
        The values as float64.

    Raises
    ------
    ValueError
        When the column is not one-dimensional or holds NaN or infinity.

    Examples
    --------
    >>> as_risk([0.5, 1]).tolist()
    [0.5, 1.0]
    """
    values = np.asarray(risk, dtype=np.float64)
    if values.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {values.shape}")
    bad = ~np.isfinite(values)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise ValueError(
            f"{name} holds {int(bad.sum())} value(s) that are not finite numbers "
            f"(first at position {first}); remove or fix those rows before evaluating"
        )
    return values


def as_flags(flags: npt.ArrayLike, size: int, name: str = "is_fraud") -> BoolArray:
    """Check and convert a flag column (booleans or 0/1) of the given length.

    Parameters
    ----------
    flags
        One flag per event: booleans, or the numbers 0 and 1.
    size
        The number of events the column must have.
    name
        The column's name, for the error message.

    Returns
    -------
    numpy.ndarray
        The flags as booleans.

    Examples
    --------
    >>> as_flags([1, 0, True], 3).tolist()
    [True, False, True]
    """
    values = np.asarray(flags)
    if values.ndim != 1 or values.shape[0] != size:
        raise ValueError(f"{name} must be one-dimensional with {size} values, got {values.shape}")
    if values.dtype != np.bool_:
        numeric = values.astype(np.float64)
        if not np.isin(numeric, (0.0, 1.0)).all():
            raise ValueError(f"{name} must hold only 0/1 or True/False")
        values = numeric == 1.0
    return values.astype(np.bool_)


def checked_columns(risk: npt.ArrayLike, is_fraud: npt.ArrayLike) -> tuple[FloatArray, BoolArray]:
    """`as_risk` and `as_flags` of two columns of one length.

    Examples
    --------
    >>> checked_columns([0.2], [1])[1].tolist()
    [True]
    """
    values = as_risk(risk)
    return values, as_flags(is_fraud, values.shape[0])


def _curve(risk: FloatArray, is_fraud: BoolArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Cumulative (true, false) positives at each distinct threshold, highest threshold first.

    Tied risks fall in one block, so a tie is never split: this is what makes AP and AUC equal
    scikit-learn's on ties.
    """
    order = np.argsort(risk, kind="stable")[::-1]
    ranked = risk[order]
    ends = np.r_[np.flatnonzero(np.diff(ranked)), ranked.size - 1]
    if ranked.size == 0:
        ends = np.zeros(0, dtype=np.int64)
    true_pos = np.cumsum(is_fraud[order], dtype=np.float64)[ends]
    false_pos = (ends + 1).astype(np.float64) - true_pos
    return true_pos, false_pos, ranked[ends]


def precision_recall_curve(
    risk: npt.ArrayLike, is_fraud: npt.ArrayLike
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Precision and recall when alerting every event with risk >= each distinct threshold.

    Parameters
    ----------
    risk
        One risk per event; higher means more likely fraud.
    is_fraud
        One flag per event (unlabelled events passed as not fraud).

    Returns
    -------
    precision, recall, thresholds : numpy.ndarray
        In scikit-learn's layout: thresholds increasing, precision and recall one longer than
        thresholds and ending with the point (recall 0, precision 1). Recall is NaN without fraud.

    Examples
    --------
    >>> p, r, t = precision_recall_curve([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1])
    >>> t.tolist(), np.round(p, 3).tolist(), r.tolist()
    ([0.1, 0.35, 0.4, 0.8], [0.5, 0.667, 0.5, 1.0, 1.0], [1.0, 1.0, 0.5, 0.5, 0.0])
    """
    values, flags = checked_columns(risk, is_fraud)
    true_pos, false_pos, thresholds = _curve(values, flags)
    alerts = true_pos + false_pos
    precision = np.divide(true_pos, alerts, out=np.zeros_like(alerts), where=alerts > 0)
    total = true_pos[-1] if true_pos.size else 0.0
    recall = true_pos / total if total > 0 else np.full_like(true_pos, np.nan)
    return np.r_[precision[::-1], 1.0], np.r_[recall[::-1], 0.0], thresholds[::-1]


def average_precision(risk: npt.ArrayLike, is_fraud: npt.ArrayLike) -> float:
    """Average precision: the sum over distinct thresholds of (gain in recall) x precision.

    Step-wise, without interpolation; tied risks form one step, as in scikit-learn's
    ``average_precision_score``.

    Parameters
    ----------
    risk
        One risk per event; higher means more likely fraud.
    is_fraud
        One flag per event (unlabelled events passed as not fraud).

    Returns
    -------
    float
        Between 0 and 1; NaN when there is no fraud (scikit-learn returns 0.0 with a warning).

    Examples
    --------
    >>> average_precision([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1])
    0.8333333333333333
    >>> average_precision([0.5, 0.5, 0.5], [1, 0, 1])  # one tied block: the fraud share
    0.6666666666666666
    """
    values, flags = checked_columns(risk, is_fraud)
    true_pos, false_pos, _ = _curve(values, flags)
    if true_pos.size == 0 or true_pos[-1] == 0:
        return math.nan
    gain = np.diff(np.r_[0.0, true_pos]) / true_pos[-1]
    return float(np.sum(gain * true_pos / (true_pos + false_pos)))


def roc_auc(risk: npt.ArrayLike, is_fraud: npt.ArrayLike) -> float:
    """Area under the ROC curve: the chance that a random fraud outranks a random non-fraud.

    Parameters
    ----------
    risk
        One risk per event; higher means more likely fraud.
    is_fraud
        One flag per event (unlabelled events passed as not fraud).

    Returns
    -------
    float
        Between 0 and 1, a tie between a fraud and a non-fraud counting one half (the
        Mann-Whitney statistic); NaN unless both outcomes occur.

    Examples
    --------
    >>> roc_auc([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1])
    0.75
    >>> roc_auc([0.5, 0.5], [1, 0])
    0.5
    """
    values, flags = checked_columns(risk, is_fraud)
    true_pos, false_pos, _ = _curve(values, flags)
    if true_pos.size == 0 or true_pos[-1] == 0 or false_pos[-1] == 0:
        return math.nan
    tpr = np.r_[0.0, true_pos / true_pos[-1]]
    fpr = np.r_[0.0, false_pos / false_pos[-1]]
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1]) / 2.0))
