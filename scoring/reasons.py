"""Reasons in plain words: each names the identifier kind and the statistic behind it.

Reasons are produced from a code (what) and a number (how much). The wording is ours and kept in
one place so that it stays consistent across the service, the backfill files and the reports.
"""

from __future__ import annotations

import math
from functools import lru_cache

KIND_WORDS = {
    "account": "account",
    "device": "device",
    "ip": "IP address",
    "ip_net": "IP network",
    "phone": "phone number",
    "phone_prefix": "phone number prefix",
    "email": "e-mail address",
    "email_domain": "e-mail domain",
}
HORIZON_WORDS = {"1h": "hour", "1d": "day", "30d": "30 days"}
_UNIT_WORDS = {"s": "second", "m": "minute", "h": "hour", "d": "day"}

_FIXED = {
    "email.disposable": "e-mail domain: on the disposable-address list",
    "phone.invalid": "phone number: not a valid number",
    "phone.voip": "phone number: a VoIP number",
    "ip.special": "IP address: in a special-purpose (non-public) range",
    "phone.no_country": "phone number: no country code",
    "email.subaddress": "e-mail address: uses a +tag sub-address",
    "ip.invalid": "IP address: not a valid address",
    "ip.v6": "IP address: IPv6",
    "email.invalid": "e-mail address: not a valid address",
}


def horizon_words(label: str) -> str:
    """Plain words for a horizon label of `scoring.features.horizon_label`.

    Half-lives and windows are configuration, so every label must read as words, not only the
    default ones.

    >>> horizon_words("1h"), horizon_words("30d"), horizon_words("10m"), horizon_words("2h")
    ('hour', '30 days', '10 minutes', '2 hours')
    """
    if label in HORIZON_WORDS:
        return HORIZON_WORDS[label]
    number, unit = label[:-1], _UNIT_WORDS.get(label[-1:])
    if unit is None or not number.isdigit():
        return label
    return unit if number == "1" else f"{number} {unit}s"


def _count(v: float) -> str:
    return f"{v:.0f}" if v >= 1.5 else f"{v:.1f}"


def _per_stat(kind_words: str, stat: str, value: float) -> str | None:
    if stat.startswith("n_"):
        horizon = horizon_words(stat[2:])
        return f"{kind_words}: {_count(value)} events in the last {horizon} (decayed count)"
    if stat == "age_d":
        return f"{kind_words}: first seen {value:.1f} days ago"
    if stat == "new":
        return f"{kind_words}: never seen before"
    if stat == "bad":
        times = math.exp(min(value, 30.0))
        return f"{kind_words}: confirmed fraud at about {times:.0f}x the usual rate"
    if stat == "young_hub":
        return f"{kind_words}: new, yet already used by about {_count(value)} accounts today"
    if stat == "accounts":
        return f"{kind_words}: used by about {_count(value)} accounts recently"
    if stat == "velocity":
        return f"{kind_words}: {_count(value)} events in the last hour"
    if stat == "new_device_and_network":
        return f"{kind_words}: {value:.0f} days old, now on a device and network it never used"
    return None


def _fanout(kind_words: str, stat: str, value: float) -> str | None:
    target, _, rest = stat.rpartition("s_")
    if target in KIND_WORDS and rest:
        window = horizon_words(rest)
        return (
            f"{kind_words}: seen with about {_count(value)} "
            f"{KIND_WORDS[target]}s in the last {window}"
        )
    if stat.endswith("_unseen") and stat[: -len("_unseen")] in KIND_WORDS:
        return f"{kind_words}: first time with this {KIND_WORDS[stat[: -len('_unseen')]]}"
    return None


def describe(code: str, value: float) -> str:
    """Plain-words reason for a reason code and the number it quotes.

    The number is first rounded to what the words show (two decimals for amounts, one
    otherwise), so that equal-looking reasons are equal strings and the wording can be cached.

    >>> describe("device.accounts", 7.2)
    'device: used by about 7 accounts recently'
    >>> describe("ip_net.accounts_1d", 41.0)
    'IP network: seen with about 41 accounts in the last day'
    >>> describe("amount.vs_usual", 6.0)
    "amount: about 6.0x this account's usual spend"
    """
    return _describe(code, display_round(code, value))


def display_round(code: str, value: float) -> float:
    """The number a reason shows: to 2 decimals for amounts, 1 otherwise, halves up.

    Written with floor so that numpy computes the very same numbers for a whole column.

    >>> display_round("device.accounts", 7.25), display_round("amount.log", 12.345)
    (7.3, 12.35)
    """
    scale = 100.0 if code == "amount.log" else 10.0
    return math.floor(value * scale + 0.5) / scale


@lru_cache(maxsize=1 << 16)
def _describe(code: str, value: float) -> str:
    if code in _FIXED:
        return _FIXED[code]
    head, _, stat = code.partition(".")
    if head == "amount":
        if stat == "vs_usual":
            return f"amount: about {value:.1f}x this account's usual spend"
        return f"amount: {value:.2f}"
    if head == "type":
        return f"event type: {stat}"
    if head == "flag":
        return _describe(_flag_code(stat), value)
    kind_words = KIND_WORDS.get(head)
    if kind_words is None:
        return code
    return _per_stat(kind_words, stat, value) or _fanout(kind_words, stat, value) or code


def _flag_code(flag: str) -> str:
    kind, _, what = flag.partition("_")
    return f"{kind}.{what}"
