"""Settings of the service, read once from the environment (prefix ``EMBERSCORE_``) and passed down.

Nothing else in the program reads the environment. Every setting has a default that works for
trying the tool out on one machine; production needs a Redis URL, a hashing secret of its own and
API keys (`Settings.check_production` refuses to start otherwise).
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

from scoring.config import DAY_S, ScoringConfig

DEVELOPMENT_SECRET = "emberscore-development-secret-do-not-use"


class SettingsError(ValueError):
    """Settings that cannot be used, with what to change."""


def _split(value: object) -> object:
    if isinstance(value, str):
        return [part.strip() for part in value.split(",") if part.strip()]
    return value


class Settings(BaseSettings):
    """All settings; environment variables are the field names upper-cased with the prefix."""

    model_config = SettingsConfigDict(env_prefix="EMBERSCORE_", extra="ignore")

    mode: Literal["development", "production"] = "development"
    redis_url: str | None = None
    redis_cluster: bool = False
    hash_secret: SecretStr = SecretStr(DEVELOPMENT_SECRET)
    api_keys: Annotated[list[SecretStr], NoDecode] = Field(default_factory=list)
    host: str = "127.0.0.1"
    port: int = 8080
    workers: int = 1
    score_budget_ms: float = 50.0
    on_store_failure: Literal["open", "closed"] = "open"
    idempotency_ttl_s: float = 3600.0
    label_horizon_s: float = 60 * DAY_S
    max_body_bytes: int = 1 << 20
    max_batch: int = 1000
    model_poll_s: float = 2.0
    store_timeout_ms: float = 1000.0
    """Time limit of store calls off the scoring path (batches, labels, reputation, readiness)."""
    metrics_dir: str | None = None
    """Folder shared by uvicorn workers for Prometheus metrics; `serve` makes one if unset."""
    learner_consumer: str = "learner-1"
    """Name of the learner in the label queue's consumer group (keep it across restarts)."""
    learner_batch: int = 500
    """Labels the learner reads, applies and acknowledges per batch."""
    learner_block_ms: int = 1000
    """How long the learner waits for new labels before it looks at maturity again."""
    learner_metrics_port: int | None = None
    """Port of the learner's own Prometheus endpoint (label lag, label outcomes); None: off."""
    reference_endpoint: bool = False
    """Serve ``POST /v1/reference``, the benchmark's floor under ``/v1/score`` (Redis only)."""
    log_shards: int = 1024
    shadow_log_max: int = 1_000_000
    default_region: str | None = None
    review_at: float = 0.25
    deny_at: float = 0.75
    base_rate: float = 0.01
    half_lives_s: Annotated[list[float], NoDecode] = Field(
        default_factory=lambda: [3600.0, DAY_S, 30 * DAY_S]
    )
    label_half_life_s: float = 30 * DAY_S
    fanout_buckets: int = 32
    maturity_s: float = 14 * DAY_S
    negative_sample_rate: float = 0.03

    @field_validator("api_keys", "half_lives_s", mode="before")
    @classmethod
    def _comma_separated(cls, value: object) -> object:
        return _split(value)

    def scoring_config(self) -> ScoringConfig:
        """The scoring core's configuration from these settings."""
        return ScoringConfig(
            half_lives_s=tuple(float(h) for h in self.half_lives_s),
            label_half_life_s=self.label_half_life_s,
            fanout_buckets=self.fanout_buckets,
            base_rate=self.base_rate,
            review_at=self.review_at,
            deny_at=self.deny_at,
            maturity_s=self.maturity_s,
            negative_sample_rate=self.negative_sample_rate,
        )

    def secret_bytes(self) -> bytes:
        return self.hash_secret.get_secret_value().encode()

    def uses_development_secret(self) -> bool:
        return self.hash_secret.get_secret_value() == DEVELOPMENT_SECRET

    def check_production(self) -> None:
        """Refuse settings that are only fit for trying things out, outside development mode."""
        if self.mode != "production":
            return
        problems = []
        if self.uses_development_secret():
            problems.append("set EMBERSCORE_HASH_SECRET to a secret of your own")
        if not self.api_keys:
            problems.append("set EMBERSCORE_API_KEYS (comma-separated) so that callers must log in")
        if self.redis_url is None:
            problems.append("set EMBERSCORE_REDIS_URL: the embedded store is for trying out only")
        if problems:
            raise SettingsError("production mode refuses to start: " + "; ".join(problems))
