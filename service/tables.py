"""Columnar value types for the files emberscore reads and writes.

Events, labels and scores travel between the file formats, the demo generator, the backfill
worker and the reports as columns (one list or numpy array per field), because every caller
handles many rows at once and a column of a million rows is cheap where a million objects are
not. These types hold values only; reading and writing them is `service.files`.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

EVENT_COLUMNS = (
    "event_id",
    "ts",
    "type",
    "account_id",
    "ip",
    "device_id",
    "phone",
    "email",
    "amount",
    "current_decision",
)
LABEL_COLUMNS = ("event_id", "labeled_at", "is_fraud")
SCORE_COLUMNS = ("event_id", "ts", "risk", "decision", "reasons")
DECISIONS = ("allow", "review", "deny")
IDENTIFIER_FIELDS = ("account_id", "ip", "device_id", "phone", "email")


@dataclass
class EventTable:
    """Events as columns. `ts_s` is epoch seconds; missing text is None; missing amount is NaN.

    `line` is the 1-based line (CSV: counting the header as line 1; JSON Lines: the line;
    Parquet: the row number plus one) that each row came from, so that messages can point at it.
    """

    event_id: list[str]
    ts_s: np.ndarray
    type: list[str]
    account_id: list[str | None]
    ip: list[str | None]
    device_id: list[str | None]
    phone: list[str | None]
    email: list[str | None]
    amount: np.ndarray
    current_decision: list[str | None]
    line: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __post_init__(self) -> None:
        if len(self.line) != len(self.event_id):
            self.line = np.arange(1, len(self.event_id) + 1, dtype=np.int64)

    def __len__(self) -> int:
        return len(self.event_id)

    def has_current_decision(self) -> bool:
        return any(d is not None for d in self.current_decision)

    def take(self, index: np.ndarray) -> EventTable:
        """Rows at `index` (an integer array), in that order."""
        idx = [int(i) for i in index]
        return EventTable(
            event_id=[self.event_id[i] for i in idx],
            ts_s=self.ts_s[index],
            type=[self.type[i] for i in idx],
            account_id=[self.account_id[i] for i in idx],
            ip=[self.ip[i] for i in idx],
            device_id=[self.device_id[i] for i in idx],
            phone=[self.phone[i] for i in idx],
            email=[self.email[i] for i in idx],
            amount=self.amount[index],
            current_decision=[self.current_decision[i] for i in idx],
            line=self.line[index],
        )

    def rows(self) -> Iterator[dict[str, object]]:
        """One dict per row with the DESIGN.md field names (`ts` as epoch seconds)."""
        for i in range(len(self)):
            yield {
                "event_id": self.event_id[i],
                "ts": float(self.ts_s[i]),
                "type": self.type[i],
                "account_id": self.account_id[i],
                "ip": self.ip[i],
                "device_id": self.device_id[i],
                "phone": self.phone[i],
                "email": self.email[i],
                "amount": None if np.isnan(self.amount[i]) else float(self.amount[i]),
                "current_decision": self.current_decision[i],
            }


@dataclass
class LabelTable:
    """Labels as columns: which event, when the label became known (epoch seconds), fraud or not."""

    event_id: list[str]
    labeled_at_s: np.ndarray
    is_fraud: np.ndarray  # bool
    line: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __post_init__(self) -> None:
        if len(self.line) != len(self.event_id):
            self.line = np.arange(1, len(self.event_id) + 1, dtype=np.int64)

    def __len__(self) -> int:
        return len(self.event_id)


@dataclass
class ScoreTable:
    """Scores as columns. `reasons` holds the reasons of one row joined by "; "."""

    event_id: list[str]
    ts_s: np.ndarray
    risk: np.ndarray
    decision: list[str]
    reasons: list[str]
    current_decision: list[str | None] | None = None
    amount: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.event_id)
