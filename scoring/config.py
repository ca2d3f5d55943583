"""What the scoring core tracks and how: kinds, half-lives, fan-out pairs, priors, thresholds.

Everything here is configuration, not code: the service builds a `ScoringConfig` from its settings
and passes it down. The defaults are documented in the README with their reasons.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

HOUR_S = 3600.0
DAY_S = 86400.0

KIND_LETTERS: dict[str, str] = {
    "account": "a",
    "device": "d",
    "ip": "i",
    "ip_net": "n",
    "phone": "p",
    "phone_prefix": "q",
    "email": "e",
    "email_domain": "m",
}
"""One letter per identifier kind, used in compact store keys and record members."""

DEFAULT_FANOUT: tuple[tuple[str, str], ...] = (
    ("device", "account"),
    ("ip", "account"),
    ("ip_net", "account"),
    ("ip_net", "device"),
    ("phone", "account"),
    ("phone_prefix", "account"),
    ("email_domain", "account"),
    ("account", "device"),
    ("account", "ip_net"),
)


class ConfigError(ValueError):
    """A scoring configuration that cannot work, with the reason."""


@dataclass(frozen=True)
class ScoringConfig:
    """Settings of the scoring core.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> cfg.half_lives_s
    (3600.0, 86400.0, 2592000.0)
    >>> cfg.ttl_s / DAY_S
    90.0
    """

    kinds: tuple[str, ...] = tuple(KIND_LETTERS)
    half_lives_s: tuple[float, ...] = (HOUR_S, DAY_S, 30 * DAY_S)
    label_half_life_s: float = 30 * DAY_S
    label_kinds: tuple[str, ...] = (
        "account",
        "device",
        "ip_net",
        "phone",
        "email",
        "email_domain",
    )
    fanout: tuple[tuple[str, str], ...] = DEFAULT_FANOUT
    fanout_buckets: int = 32
    fanout_windows_s: tuple[float, float] = (DAY_S, 30 * DAY_S)
    base_rate: float = 0.01
    prior_strength: float = 50.0
    ttl_half_lives: float = 3.0
    review_at: float = 0.25
    deny_at: float = 0.75
    maturity_s: float = 14 * DAY_S
    negative_sample_rate: float = 0.03
    learning_rate: float = 0.02
    l2: float = 1e-4
    takeover_labels: int = 200
    takeover_negatives: int = 1000
    warmup_s: float = 3 * DAY_S
    censored_age_s: float = 30 * DAY_S
    reasons: int = 3
    reasons_min_risk: float | None = None
    amount_kind: str = "account"

    def __post_init__(self) -> None:
        self._check_kinds()
        self._check_numbers()

    def _check_kinds(self) -> None:
        unknown = [k for k in self.kinds if k not in KIND_LETTERS]
        if unknown:
            raise ConfigError(
                f"kinds: unknown identifier kinds {unknown}; known: {list(KIND_LETTERS)}"
            )
        if any(k not in self.kinds for k in self.label_kinds):
            raise ConfigError("label_kinds must be tracked kinds")
        for kind, target in self.fanout:
            if kind not in self.kinds or target not in self.kinds:
                raise ConfigError(
                    f"fanout: the pair ({kind}, {target}) names a kind not in kinds; "
                    "track the kind or drop the pair"
                )
        if self.label_half_life_s not in self.half_lives_s:
            raise ConfigError(
                "label_half_life_s must equal one of half_lives_s: the event counter with that "
                "half-life is the exposure of the bad rate"
            )

    def _check_numbers(self) -> None:
        if not self.half_lives_s or min(self.half_lives_s) <= 0:
            raise ConfigError(
                f"half_lives_s must be positive seconds, got {list(self.half_lives_s)}"
            )
        if not self.prior_strength > 0.0:
            raise ConfigError("prior_strength must be positive (pseudo-events of the Beta prior)")
        if not 0.0 < self.base_rate < 1.0:
            raise ConfigError("base_rate must be strictly between 0 and 1")
        if not 0.0 <= self.review_at <= self.deny_at <= 1.0:
            raise ConfigError("thresholds must satisfy 0 <= review_at <= deny_at <= 1")
        if not 0.0 < self.negative_sample_rate <= 1.0:
            raise ConfigError("negative_sample_rate must be in (0, 1]")
        if self.fanout_buckets < 2:
            raise ConfigError("fanout_buckets must be at least 2")

    @property
    def ttl_s(self) -> float:
        """Lifetime of an identifier's record after its last event: a few longest half-lives."""
        return self.ttl_half_lives * max(self.half_lives_s)

    @property
    def reason_floor_risk(self) -> float:
        """Events below this risk get no reasons: nothing lifts them above the base rate."""
        return self.base_rate if self.reasons_min_risk is None else self.reasons_min_risk

    @property
    def exposure_index(self) -> int:
        """Index of the event counter that serves as the bad rate's exposure."""
        return self.half_lives_s.index(self.label_half_life_s)

    @property
    def prior_alpha(self) -> float:
        """Beta prior pseudo-count of fraud events (``base_rate * prior_strength``)."""
        return self.base_rate * self.prior_strength

    @property
    def prior_beta(self) -> float:
        """Beta prior pseudo-count of legitimate events."""
        return (1.0 - self.base_rate) * self.prior_strength

    @property
    def base_logit(self) -> float:
        """Log-odds of the base rate."""
        return math.log(self.base_rate / (1.0 - self.base_rate))

    def targets_of(self, kind: str) -> tuple[str, ...]:
        """Kinds whose fan-out ``kind`` tracks."""
        return tuple(t for k, t in self.fanout if k == kind)
