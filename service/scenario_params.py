"""Every knob of the demo scenario, with defaults that give the demo world."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from service.scenario_events import ATTACK_SHAPES
from service.scenario_rules import RuleSet

DEFAULT_SIZE = 120_000


class ScenarioError(ValueError):
    """A scenario parameter is out of range; the message names it and the allowed values."""


def _default_mix() -> dict[str, float]:
    return {"device_farm": 0.30, "proxy_rotation": 0.30, "slow_campaign": 0.15, "takeover": 0.25}


@dataclass
class ScenarioParams:
    """Knobs of the generated world. Counts marked "scaled" are for the default 120,000 events
    and grow in proportion with `n_events`. `seed` changes every random draw."""

    seed: int = 7
    n_events: int = DEFAULT_SIZE  # approximate total
    days: int = 42
    start_s: float = 1_788_739_200.0  # 2026-09-07T00:00:00Z, a Monday (invented)

    # Benign population.
    signup_share: float = 0.06  # of benign events outside the bursts
    sessions_per_day: float = 0.12  # mean per established account (lognormal spread)
    login_share: float = 0.8  # sessions that open with a login (the rest were still logged in)
    checkout_probs: tuple[float, float, float] = (0.5, 0.42, 0.08)  # 0, 1, 2 checkouts a session
    first_checkout_share: float = 0.55  # new accounts buying right after signing up
    amount_median: float = 38.0
    amount_sigma: float = 0.95
    no_phone_share: float = 0.15
    landline_share: float = 0.12
    phone_typo_share: float = 0.004  # benign users who mistype their number (flagged, not fraud)
    spaced_phone_share: float = 0.15  # numbers typed with spaces instead of plain E.164
    plus_tag_share: float = 0.04
    capital_email_share: float = 0.03
    no_device_share: float = 0.02
    mobile_share: float = 0.3  # mean share of a user's sessions on a mobile carrier
    ipv6_household_share: float = 0.35
    vpn_user_share: float = 0.03
    device_change_share: float = 0.05  # established users who get a new phone mid-stream
    shared_device_share: float = 0.35  # of households with two or more accounts

    # Benign bursts.
    promo_day: int = 24
    promo_multiplier: float = 5.0
    campus_accounts: int = 300  # scaled
    campus_wave_day: int = 10
    campus_wave_signups: int = 120  # scaled; within three hours, on the campus network

    # Attacks.
    fraud_share: float = 0.03  # of all events
    attack_mix: dict[str, float] = field(default_factory=_default_mix)
    farm_accounts_per_device: int = 25
    farm_waves: int = 6
    proxy_campaigns: int = 3
    slow_start_day: int = 5
    slow_days: int = 28
    takeover_victims_per_device: int = 8

    # Labels.
    chargeback_share: float = 0.65  # of fraudulent checkouts
    chargeback_delay_days: tuple[float, float] = (10.0, 45.0)
    confirm_share: float = 0.5  # of fraudulent sign-ups and logins, by manual review
    confirm_delay_days: tuple[float, float] = (1.0, 7.0)
    cleared_share: float = 0.8  # of benign events the rules sent to review
    cleared_delay_days: tuple[float, float] = (0.05, 3.0)
    audit_share: float = 0.01  # of benign checkouts confirmed legitimate by spot checks
    audit_delay_days: tuple[float, float] = (2.0, 14.0)

    # Thresholds of the rules in force; the world adds its incident lists.
    rules: RuleSet = field(default_factory=RuleSet)

    @property
    def scale(self) -> float:
        return self.n_events / DEFAULT_SIZE

    def __post_init__(self) -> None:
        self.validate()

    def validate(self) -> None:
        """Raise `ScenarioError` naming the first knob out of range."""
        _check(1_000 <= self.n_events <= 20_000_000, "n_events", "from 1,000 to 20,000,000")
        _check(14 <= self.days <= 366, "days", "from 14 to 366")
        _check(math.isfinite(self.start_s) and self.start_s >= 0, "start_s", "epoch seconds >= 0")
        for name in ("promo_day", "campus_wave_day"):
            _check(1 <= getattr(self, name) < self.days - 1, name, f"from 1 to {self.days - 2}")
        _check(self.slow_start_day + 7 <= self.days, "slow_start_day", f"<= {self.days - 7}")
        _check(self.slow_days >= 7, "slow_days", ">= 7")
        for f_name in _SHARES:
            _check(0.0 <= getattr(self, f_name) <= 1.0, f_name, "a share from 0 to 1")
        _check(self.fraud_share <= 0.5, "fraud_share", "at most 0.5")
        unknown = set(self.attack_mix) - set(ATTACK_SHAPES)
        _check(not unknown, "attack_mix", f"keys among {', '.join(ATTACK_SHAPES)}")
        _check(all(v >= 0 for v in self.attack_mix.values()), "attack_mix", "weights >= 0")
        _check(sum(self.attack_mix.values()) > 0, "attack_mix", "weights with a positive sum")
        _check(self.sessions_per_day > 0, "sessions_per_day", "> 0")
        _check(self.amount_median > 0 and self.amount_sigma >= 0, "amount_median", "> 0")
        _check(self.promo_multiplier >= 1.0, "promo_multiplier", ">= 1")
        for f_name in _DELAYS:
            lo, hi = getattr(self, f_name)
            _check(0.0 <= lo <= hi, f_name, "(low, high) days with 0 <= low <= high")
        for f_name in _COUNTS:
            _check(getattr(self, f_name) >= 1, f_name, ">= 1")


_SHARES = (
    "signup_share", "login_share", "first_checkout_share", "no_phone_share", "landline_share",
    "phone_typo_share", "spaced_phone_share", "plus_tag_share", "capital_email_share",
    "no_device_share", "mobile_share", "ipv6_household_share", "vpn_user_share",
    "device_change_share", "shared_device_share", "fraud_share", "chargeback_share",
    "confirm_share", "cleared_share", "audit_share",
)  # fmt: skip
_DELAYS = ("chargeback_delay_days", "confirm_delay_days", "cleared_delay_days", "audit_delay_days")
_COUNTS = ("farm_accounts_per_device", "farm_waves", "proxy_campaigns",
           "takeover_victims_per_device")  # fmt: skip


def _check(ok: bool, name: str, allowed: str) -> None:
    if not ok:
        raise ScenarioError(f"scenario parameter {name!r} must be {allowed}")
