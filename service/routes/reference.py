"""``POST /v1/reference``: the floor under ``/v1/score`` for the service benchmark (off by default).

It takes the same body (`EventIn`, the same strict parsing), the same API-key check, the same
fast lane (`service.routes.lane`) and the same budget as ``/v1/score``, then
makes one pipelined Redis round trip of the same size and kind as a scored event's
(`RedisStore.begin`): a claim (SET NX GET PX), and for each identifier the event carries, its
read and writes in the store's own form (one EVALSHA of the update script on a single server;
ZRANGE, ZINCRBY per decay sum, ZADD LT, ZADD GT, ZREM and EXPIRE on a cluster), built by the
store's own `WritePlanner` and sent by its own `EventExchange`. It does no scoring: no
normalisation, no hashing with the service's secret, no feature reading, no model. Measuring both
routes in one run gives the cost of scoring against this floor.

The writes go to scratch keys (``ref{...}``, a minute to live), never to real state. Their names
come from a keyed BLAKE2b of the raw field under a random key drawn once per process, so no raw
value reaches Redis and the names mean nothing outside the process. Each identifier field counts
as the kinds it gives when valid (DESIGN.md, "Identifiers"): account 1, device 1, ip 2, phone 2,
e-mail 2.

The application includes this router when ``EMBERSCORE_REFERENCE_ENDPOINT=true``. It needs the
Redis store: it uses ``runtime.store.fast`` (the store's request-path client),
``runtime.store.planner`` (its `WritePlanner`) and ``runtime.store.exchange`` (its
`EventExchange`) through the `Runtime` dependency, and answers 503 on the embedded store or while
Redis is not connected.
"""

from __future__ import annotations

import hashlib
import secrets
from base64 import urlsafe_b64encode
from typing import Any

from fastapi import APIRouter, HTTPException, Response
from pydantic import BaseModel

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.event import Event, EventPlan
from scoring.profile import TimeBasis
from service.api_models import EventIn, Message, ValidationProblems
from service.routes.deps import ApiKey, Runtime, RuntimeDep, store_unavailable
from service.routes.lane import JSON_TYPE
from service.stores.base import StoreUnavailable

router = APIRouter(prefix="/v1", tags=["benchmark"], dependencies=[ApiKey])

SCRATCH_TTL_S = 60
FIELD_KINDS: dict[str, tuple[str, ...]] = {  # in the order `normalise_event` gives keys
    "account_id": ("account",),
    "device_id": ("device",),
    "ip": ("ip", "ip_net"),
    "phone": ("phone", "phone_prefix"),
    "email": ("email", "email_domain"),
}
_SCRATCH_KEY = secrets.token_bytes(32)


class ReferenceOut(BaseModel):
    """What the reference round trip did (no score: nothing was scored)."""

    event_id: str
    identifiers: int
    commands: int


def scratch_digest(kind: str, value: str) -> bytes:
    """8-byte keyed BLAKE2b of a raw value under this process's random key."""
    data = f"{kind}\x00{value}".encode("utf-8", "surrogatepass")
    return hashlib.blake2b(data, key=_SCRATCH_KEY, digest_size=8).digest()


def scratch_key(kind: str, digest: bytes) -> str:
    """A scratch key, apart from every key the store uses."""
    return f"ref{{{KIND_LETTERS[kind]}{urlsafe_b64encode(digest).rstrip(b'=').decode()}}}"


def reference_plan(event: Event, config: ScoringConfig) -> EventPlan:
    """A plan with the real plan's shape (kinds, fan-out hits, amount) without normalising."""
    identifiers: list[tuple[str, bytes]] = []
    for name, kinds in FIELD_KINDS.items():
        value = getattr(event, name)
        if value and value.strip():
            identifiers += [(k, scratch_digest(k, value)) for k in kinds if k in config.kinds]
    m = config.fanout_buckets
    buckets = {k: (KIND_LETTERS[k], int.from_bytes(d[4:8], "big") % m) for k, d in identifiers}
    hits = tuple(
        tuple(buckets[t] for t in config.targets_of(kind) if t in buckets)
        for kind, _ in identifiers
    )
    amount = event.amount if event.amount is not None and event.amount > 0 else None
    return EventPlan(
        event,
        scratch_digest("event", event.event_id),
        TimeBasis.at(event.ts_s, config),
        tuple(identifiers),
        hits,
        tuple(amount if kind == config.amount_kind else None for kind, _ in identifiers),
        frozenset(),
    )


def scratch_claim_key(event_digest: bytes) -> str:
    """The scratch key standing in for an event's claim."""
    return "ref{i" + urlsafe_b64encode(event_digest).rstrip(b"=").decode() + "}"


async def round_trip(store: Any, plan: EventPlan, budget_s: float) -> int:
    """One pipelined exchange with the commands of ``plan`` on scratch keys; replies received.

    ``store`` is the `RedisStore`: its request-path client, `WritePlanner` and `EventExchange`
    (which knows whether the server runs the update script) are used as `begin` uses them.
    """
    # imports redis: only when Redis is in use
    from service.stores.redis_client import guard
    from service.stores.redis_event import Claim

    writes = store.planner.event(plan)
    keys = [scratch_key(kind, digest) for kind, digest in plan.identifiers]
    claims = [Claim(scratch_claim_key(plan.event_digest), b"", SCRATCH_TTL_S * 1000)]
    async with guard("the reference round trip", budget_s):
        done = await store.exchange.run(store.fast, claims, keys, writes, True, SCRATCH_TTL_S)
    return int(done.commands)


async def _answer(runtime: Runtime, plan: EventPlan) -> int:
    store = runtime.store
    if runtime.mode != "redis":
        raise HTTPException(
            503, "the reference endpoint needs the Redis store: set EMBERSCORE_REDIS_URL"
        )
    from service.stores.redis import RedisStore  # as in service.app: redis only when in use

    if not isinstance(store, RedisStore):  # Redis was not reachable yet
        raise store_unavailable("reference")
    try:
        return await round_trip(store, plan, runtime.score_budget_s)
    except StoreUnavailable as exc:
        runtime.metrics.store_error("reference", exc)
        raise store_unavailable("reference") from exc


@router.post(
    "/reference",
    response_model=ReferenceOut,
    summary="Benchmark floor: parse a score request and make one Redis round trip, no scoring",
    responses={
        401: {"model": Message},
        422: {"model": ValidationProblems},
        503: {"model": Message, "description": "no Redis store, or Redis unavailable"},
    },
)
async def reference(body: EventIn, runtime: RuntimeDep) -> Response:
    plan = reference_plan(body.to_event(), runtime.config)
    commands = await _answer(runtime, plan)
    out = ReferenceOut(event_id=body.event_id, identifiers=len(plan.identifiers), commands=commands)
    return Response(out.model_dump_json(), media_type=JSON_TYPE)
