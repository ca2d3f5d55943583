"""Scoring configuration (`scoring.config.ScoringConfig`): every refusal names its setting.

A `ConfigError` reaches the user as one line (``emberscore`` prints user errors without a
traceback), so the line must name the setting to change, spelled as the field is spelled (the
service's environment variables are the same names with the ``EMBERSCORE_`` prefix). The derived
quantities are checked against their definitions: the Beta prior's pseudo-counts
``a = base_rate * strength`` and ``b = (1 - base_rate) * strength`` (Beta-binomial conjugate prior,
Gelman et al., Bayesian Data Analysis, 3rd ed., chapter 2; from memory) and the logit
``log(p / (1 - p))``.
"""

from __future__ import annotations

import math
from typing import Any

import pytest

from scoring.config import DAY_S, ConfigError, ScoringConfig

# (case, keyword arguments, setting the message must name)
REFUSALS: list[tuple[str, dict[str, Any], str]] = [
    ("unknown kind", {"kinds": ("account", "fax")}, "kinds"),
    ("label kind not tracked", {"label_kinds": ("account", "fax")}, "label_kinds"),
    (
        "fan-out pair names an untracked kind",
        {"kinds": ("account", "device"), "label_kinds": ("account",)},
        "fanout",
    ),
    ("fan-out target unknown", {"fanout": (("device", "fax"),)}, "fanout"),
    (
        "label half-life is none of the counters",
        {"label_half_life_s": 7 * DAY_S},
        "label_half_life_s",
    ),
    (
        "zero half-life",
        {"half_lives_s": (0.0, 3600.0), "label_half_life_s": 3600.0},
        "half_lives_s",
    ),
    (
        "negative half-life",
        {"half_lives_s": (-60.0, 3600.0), "label_half_life_s": 3600.0},
        "half_lives_s",
    ),
    ("no half-life at all", {"half_lives_s": ()}, "half_lives_s"),
    ("base rate zero", {"base_rate": 0.0}, "base_rate"),
    ("base rate one", {"base_rate": 1.0}, "base_rate"),
    ("base rate not a number", {"base_rate": math.nan}, "base_rate"),
    ("review above deny", {"review_at": 0.8, "deny_at": 0.5}, "review_at"),
    ("deny above one", {"deny_at": 1.5}, "deny_at"),
    ("review below zero", {"review_at": -0.1}, "review_at"),
    ("sample rate zero", {"negative_sample_rate": 0.0}, "negative_sample_rate"),
    ("sample rate above one", {"negative_sample_rate": 1.5}, "negative_sample_rate"),
    ("one fan-out bucket", {"fanout_buckets": 1}, "fanout_buckets"),
    ("prior strength zero", {"prior_strength": 0.0}, "prior_strength"),
    ("prior strength negative", {"prior_strength": -5.0}, "prior_strength"),
]


@pytest.mark.parametrize(
    ("kwargs", "setting"), [(k, s) for _, k, s in REFUSALS], ids=[c for c, _, _ in REFUSALS]
)
def test_every_refusal_names_its_setting(kwargs: dict[str, Any], setting: str) -> None:
    with pytest.raises(ConfigError) as caught:
        ScoringConfig(**kwargs)
    assert setting in str(caught.value), str(caught.value)


def test_config_error_is_a_value_error() -> None:
    """Callers that catch ValueError for bad input keep working."""
    assert issubclass(ConfigError, ValueError)


def test_prior_strength_zero_used_to_crash_the_reader() -> None:
    """Regression: ``prior_strength=0`` was accepted, and the first identifier with history
    then failed in the feature reader with "math domain error" (log of a zero bad rate); it is
    now refused up front, naming the setting."""
    with pytest.raises(ConfigError, match="prior_strength"):
        ScoringConfig(prior_strength=0.0)


def test_boundaries_that_are_allowed() -> None:
    """Equal thresholds, a sample rate of 1 (no sampling) and two buckets are valid."""
    ScoringConfig(review_at=0.5, deny_at=0.5)
    ScoringConfig(review_at=0.0, deny_at=1.0)
    ScoringConfig(negative_sample_rate=1.0)
    ScoringConfig(fanout_buckets=2)
    ScoringConfig(kinds=("account",), label_kinds=("account",), fanout=())


def test_derived_quantities_follow_their_definitions() -> None:
    cfg = ScoringConfig(base_rate=0.02, prior_strength=40.0, ttl_half_lives=2.5)
    assert cfg.prior_alpha == pytest.approx(0.8, abs=1e-15)  # a = p * s
    assert cfg.prior_beta == pytest.approx(39.2, abs=1e-12)  # b = (1 - p) * s
    assert cfg.base_logit == pytest.approx(math.log(0.02 / 0.98), abs=1e-15)  # logit
    assert cfg.ttl_s == 2.5 * 30 * DAY_S  # a few of the longest half-life
    assert cfg.exposure_index == 2  # the 30-day counter serves as the bad rate's exposure
    assert cfg.reason_floor_risk == 0.02  # no reasons below the base rate by default
    assert ScoringConfig(reasons_min_risk=0.3).reason_floor_risk == 0.3


def test_targets_of_follows_the_fanout_pairs() -> None:
    cfg = ScoringConfig()
    assert cfg.targets_of("account") == ("device", "ip_net")
    assert cfg.targets_of("ip_net") == ("account", "device")
    assert cfg.targets_of("email") == ()
