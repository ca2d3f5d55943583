"""What every route needs, as FastAPI dependencies: the running service, the API key check.

`Runtime` holds the parts `service.app` builds when the application starts (store, engine,
metrics); a route takes it as ``runtime: RuntimeDep``. Store calls off the scoring path go
through `Runtime.bounded`, which gives up after ``store_timeout_ms`` and turns a failure into a
503 answer that says the store is unavailable (and counts it).
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable
from dataclasses import dataclass, field
from typing import Annotated, Any, Literal, TypeVar

from fastapi import Depends, HTTPException, Request, Security

from scoring.config import ScoringConfig
from service.config import Settings
from service.engine import Engine
from service.metrics import Metrics
from service.reputation import Reputation
from service.security import api_key_header, check_api_key
from service.stores.base import StoreUnavailable

T = TypeVar("T")
log = logging.getLogger("emberscore.service")


class FieldError(Exception):
    """A request that is well-formed JSON but wrong in one field: answered 422 like pydantic's."""

    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason


@dataclass
class Runtime:
    """The parts of a running service.

    ``store`` is a `StateStore` (the Redis store adds the label queue and the shadow log).
    ``model_problem`` is None while the model in use is the latest one that could be loaded, or
    says why not (readiness reports it).
    """

    settings: Settings
    config: ScoringConfig
    store: Any
    engine: Engine
    metrics: Metrics
    reputation: Reputation
    mode: Literal["embedded", "redis"]
    model_problem: str | None = "not loaded yet"
    tasks: list[asyncio.Task[None]] = field(default_factory=list)

    @property
    def score_budget_s(self) -> float:
        return self.settings.score_budget_ms / 1000.0

    @property
    def store_timeout_s(self) -> float:
        return self.settings.store_timeout_ms / 1000.0

    async def bounded(self, operation: str, call: Awaitable[T]) -> T:
        """Await a store call within ``store_timeout_ms``; 503 when the store fails."""
        try:
            async with asyncio.timeout(self.store_timeout_s):
                return await call
        except (TimeoutError, StoreUnavailable) as exc:
            self.metrics.store_error(operation, exc)
            log.warning("store failed during %s: %s", operation, type(exc).__name__)
            raise store_unavailable(operation) from exc


def store_unavailable(operation: str, extra: str = "") -> HTTPException:
    return HTTPException(
        503,
        f"the store is unavailable ({operation}); retry later{extra}",
        headers={"Retry-After": "1"},
    )


def get_runtime(request: Request) -> Runtime:
    runtime: Runtime = request.app.state.runtime
    return runtime


async def require_api_key(
    request: Request, presented: Annotated[str | None, Security(api_key_header)]
) -> None:
    check_api_key(request, presented)


RuntimeDep = Annotated[Runtime, Depends(get_runtime)]
ApiKey = Depends(require_api_key)
