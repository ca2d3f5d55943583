"""Evaluation of a risk score against fraud outcomes: ranking metrics, thresholds, shadow figures.

Pure functions on plain arrays (numpy only, no files, no clock). The work lives in four modules,
gathered here so that callers import one name:

- `scoring.evaluate_ranking`: precision-recall curve, average precision, ROC AUC;
- `scoring.evaluate_alerts`: alerting at a threshold, an alert count or an alert rate, with a
  stated tie rule;
- `scoring.evaluate_daily`: per-day precision of a reviewer's top-k queue, thresholds that fit a
  daily review capacity;
- `scoring.evaluate_shadow`: catch rates per segment and the comparison of emberscore's decisions
  with the rules in force;
- `scoring.evaluate_calibration`: risk bands against fraud shares, and the Brier score.

Label semantics: an event without a label counts as not fraud (common practice, no source). To
count only labels known by a date, the caller drops later labels before calling these functions.

>>> from scoring.evaluate import average_precision, roc_auc
>>> average_precision([0.2, 0.9, 0.4], [0, 1, 1]), roc_auc([0.2, 0.9, 0.4], [0, 1, 1])
(1.0, 1.0)
"""

from __future__ import annotations

from scoring.evaluate_alerts import (
    AlertResult,
    TieRule,
    alert_count,
    alert_weights,
    at_alert_count,
    at_alert_rate,
    at_threshold,
    top_mask,
)
from scoring.evaluate_calibration import (
    RISK_BANDS,
    CalibrationBand,
    brier_score,
    calibration_table,
)
from scoring.evaluate_daily import (
    CapacityThreshold,
    DailyPrecision,
    capacity_table,
    daily_counts,
    precision_at_k_per_day,
    threshold_for_capacity,
    utc_day,
)
from scoring.evaluate_ranking import (
    as_risk,
    average_precision,
    precision_recall_curve,
    roc_auc,
)
from scoring.evaluate_shadow import (
    DECISIONS,
    AmountSplit,
    CatchSplit,
    SegmentCatch,
    ShadowComparison,
    catch_rate,
    compare_decisions,
    decision_codes,
    segment_catch_rates,
    split_catches,
)

__all__ = [
    "DECISIONS",
    "RISK_BANDS",
    "AlertResult",
    "AmountSplit",
    "CalibrationBand",
    "CapacityThreshold",
    "CatchSplit",
    "DailyPrecision",
    "SegmentCatch",
    "ShadowComparison",
    "TieRule",
    "alert_count",
    "alert_weights",
    "as_risk",
    "at_alert_count",
    "at_alert_rate",
    "at_threshold",
    "average_precision",
    "brier_score",
    "calibration_table",
    "capacity_table",
    "catch_rate",
    "compare_decisions",
    "daily_counts",
    "decision_codes",
    "precision_at_k_per_day",
    "precision_recall_curve",
    "roc_auc",
    "segment_catch_rates",
    "split_catches",
    "threshold_for_capacity",
    "top_mask",
    "utc_day",
]
