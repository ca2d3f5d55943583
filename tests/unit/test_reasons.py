"""Reasons in plain words (`scoring.reasons`): every code, rounding, stability.

References: the rounding rule is checked against Python's `decimal` module (``ROUND_HALF_UP`` of
the value's exact binary expansion to 0.1, or 0.01 for amounts) on the conformance table
``tests/data/display_round_cases.csv``; the wording rules (every reason names an identifier kind,
"amount" or "event type", and never shows a raw code) are the project's own (DESIGN.md, Fusion:
"each naming the identifier kind and the statistic in plain words").
"""

from __future__ import annotations

import csv
import re
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.config import DAY_S, ScoringConfig
from scoring.features import FeatureLayout
from scoring.prior import Prior
from scoring.reasons import KIND_WORDS, describe, display_round

DATA = Path(__file__).parent.parent / "data"
CONFIGS = {
    "default": ScoringConfig(),
    "short horizons": ScoringConfig(
        half_lives_s=(60.0, 600.0, 7200.0),
        label_half_life_s=600.0,
        fanout_windows_s=(900.0, 2 * DAY_S),
    ),
    "one kind": ScoringConfig(kinds=("account",), label_kinds=("account",), fanout=()),
}
SUBJECTS = {*KIND_WORDS.values(), "amount", "event type"}


def codes_of(config: ScoringConfig) -> list[str]:
    """Every reason code the configuration can produce: layout names and prior codes."""
    return [*FeatureLayout.of(config).names, *Prior(config).codes]


ALL_CODES = sorted({c for cfg in CONFIGS.values() for c in codes_of(cfg)})


@pytest.mark.parametrize("name", list(CONFIGS))
def test_every_code_reads_as_plain_words(name: str) -> None:
    for code in codes_of(CONFIGS[name]):
        for value in (0.4, 3.0, 41.0):
            text = describe(code, value)
            subject, colon, rest = text.partition(": ")
            assert colon, (code, text)
            assert rest, (code, text)
            assert subject in SUBJECTS, (code, text)
            head = code.partition(".")[0]
            if head in KIND_WORDS and not code.startswith(("email.", "ip.", "phone.")):
                assert subject == KIND_WORDS[head], (code, text)  # the right kind is named
            assert code not in text, (code, text)
            assert "_" not in text, (code, text)  # no raw statistic or kind names
            assert not re.search(r"\b\d+[mhd]\b", text), (code, text)  # horizons in words


def test_flag_reasons_name_the_field_they_come_from() -> None:
    assert describe("flag.email_disposable", 1.0).startswith("e-mail domain: ")
    assert describe("flag.phone_voip", 1.0).startswith("phone number: ")
    assert describe("flag.ip_special", 1.0).startswith("IP address: ")
    assert describe("email.disposable", 1.0) == describe("flag.email_disposable", 1.0)


@pytest.mark.parametrize(
    ("code", "value", "text"),
    [
        ("device.n_1h", 12.4, "device: 12 events in the last hour (decayed count)"),
        ("device.n_1h", 0.44, "device: 0.4 events in the last hour (decayed count)"),
        (
            "ip_net.accounts_30d",
            41.0,
            "IP network: seen with about 41 accounts in the last 30 days",
        ),
        ("account.device_unseen", 1.0, "account: first time with this device"),
        ("email_domain.age_d", 0.25, "e-mail domain: first seen 0.3 days ago"),
        ("phone.new", 1.0, "phone number: never seen before"),
        ("type.checkout", 1.0, "event type: checkout"),
        ("amount.log", 12.345, "amount: 12.35"),
    ],
)
def test_worded_by_hand(code: str, value: float, text: str) -> None:
    assert describe(code, value) == text


@pytest.mark.parametrize(
    ("code", "text"),
    [
        ("account.n_2h", "account: 3 events in the last 2 hours (decayed count)"),
        ("account.n_10m", "account: 3 events in the last 10 minutes (decayed count)"),
        ("account.n_1m", "account: 3 events in the last minute (decayed count)"),
        ("device.accounts_15m", "device: seen with about 3 accounts in the last 15 minutes"),
        ("device.accounts_2d", "device: seen with about 3 accounts in the last 2 days"),
    ],
)
def test_configured_horizons_read_as_words(code: str, text: str) -> None:
    """Regression: half-lives are a setting (``EMBERSCORE_HALF_LIVES_S``), but only the
    default horizons had words; any other showed its raw label ("in the last 10m")."""
    assert describe(code, 3.0) == text


def _table() -> list[dict[str, str]]:
    with (DATA / "display_round_cases.csv").open(newline="") as f:
        return list(csv.DictReader(f))


def _decimal_half_up(code: str, value: float) -> float:
    step = Decimal("0.01") if code == "amount.log" else Decimal("0.1")
    return float(Decimal(value).quantize(step, rounding=ROUND_HALF_UP))


@pytest.mark.parametrize("row", _table(), ids=lambda r: r["case"])
def test_display_round_is_decimal_half_up(row: dict[str, str]) -> None:
    code, value, expected = row["code"], float(row["value"]), float(row["expected"])
    assert _decimal_half_up(code, value) == expected, row["source"]  # the table itself
    assert display_round(code, value) == expected, row["source"]


@given(st.floats(0.0, 1e9), st.sampled_from(["device.accounts", "amount.log"]))
def test_display_round_agrees_with_decimal_off_ties(value: float, code: str) -> None:
    """Away from written ties (see below), the floor formula equals decimal half-up."""
    scale = 100 if code == "amount.log" else 10
    if abs(value * scale % 1.0 - 0.5) < 1e-6:
        return  # a decimal tie: covered by the table and the next test
    assert display_round(code, value) == _decimal_half_up(code, value)


@pytest.mark.parametrize(("value", "low", "high"), [(0.15, 0.1, 0.2), (2.65, 2.6, 2.7)])
def test_written_ties_round_to_a_neighbour(value: float, low: float, high: float) -> None:
    """A tie written in decimal that binary cannot hold (0.15 is 0.1499999...) goes to one of
    its two neighbours, depending on how ``value * 10`` rounds: 0.15 gives 0.2 where decimal
    half-up of the binary value gives 0.1. Either shows the number honestly."""
    assert display_round("device.accounts", value) in (low, high)


def test_negative_ties_go_up() -> None:
    """Halves go towards +infinity (floor(v + 1/2)): -7.25 shows as -7.2 (decimal's
    ROUND_HALF_UP would give -7.3, away from zero). Only log-odds excesses can be negative."""
    assert display_round("account.bad", -7.25) == -7.2
    assert display_round("account.bad", -7.26) == -7.3


values = st.one_of(
    st.floats(-50.0, 1e7, allow_nan=False),
    st.sampled_from([0.05, 0.15, 0.25, 1.005, 2.675, 7.25, 12.345, 99.95, 1e6 + 0.05]),
)


@given(st.sampled_from(ALL_CODES), values)
def test_describe_is_stable_under_re_rounding(code: str, value: float) -> None:
    """describe(c, display_round(c, v)) == describe(c, v): what a stored answer keeps (the
    rounded number) gives the same words as the live answer."""
    rounded = display_round(code, value)
    assert display_round(code, rounded) == rounded
    assert describe(code, rounded) == describe(code, value)
