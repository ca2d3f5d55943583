"""The fast lane (`service.routes.lane`): the same answers as FastAPI's own handling.

- A request the lane answers and the same request answered by FastAPI (sent with a
  ``+json`` content type, which FastAPI accepts and the lane leaves to it) give the same
  status, the same body bytes and the same content headers, for accepted events, retries,
  and the 409 of an event id in flight.
- Validation: for any JSON object, ``EventIn.model_validate_json`` (the lane) accepts exactly
  what FastAPI accepts (it parses with ``json.loads``, then validates the Python value), with
  the same values (FastAPI's documented request-body handling: JSON body into the model).
- The request metrics and the access log name the route template for answers the lane gives.
- What the service's middlewares do for FastAPI's routes holds for the lane's answers too: an
  unexpected error is a bare 500 logged without its message (and counted as a 500), and an
  oversize body is refused with 413 whether declared or streamed (the lane leaves both a body
  without a declared length and an oversize one to the middlewares).
"""

from __future__ import annotations

import asyncio
import json
import logging
from typing import Any

import pytest
from hypothesis import given
from hypothesis import settings as examples
from hypothesis import strategies as st
from pydantic import ValidationError
from test_api_support import event, inject, running, settings, wait_for

from service.api_models import EventIn
from service.routes.lane import plain_json

pytestmark = pytest.mark.anyio

LANE = {"content-type": "application/json"}
FASTAPI = {"content-type": "application/vnd.emberscore+json"}  # accepted by FastAPI only


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _same(a: Any, b: Any) -> None:
    assert a.status_code == b.status_code
    assert a.content == b.content
    for name in ("content-type", "content-length"):
        assert a.headers.get(name) == b.headers.get(name)


async def _answers(headers: dict[str, str]) -> list[Any]:
    bodies = [event(n * 30, account_id=f"acct-{n % 3}") for n in range(8)]
    async with running() as (client, _):
        answers = [await client.post("/v1/score", content=json.dumps(b), headers=headers)
                   for b in bodies]  # fmt: skip
        retry = bodies[2] | {"device_id": "dev-other"}
        answers.append(await client.post("/v1/score", content=json.dumps(retry), headers=headers))
    return answers


async def test_lane_answers_equal_fastapi_answers() -> None:
    lane, documented = await _answers(LANE), await _answers(FASTAPI)
    assert all(a.status_code == 200 for a in lane)
    assert lane[-1].json()["duplicate"] is True
    for a, b in zip(lane, documented, strict=True):
        _same(a, b)


async def _in_flight(headers: dict[str, str]) -> Any:
    gate, entered = asyncio.Event(), asyncio.Event()
    async with running() as (client, app):
        inject(app, {"commit": wait_for(gate, entered)})
        body = json.dumps(event(7))
        first = asyncio.create_task(client.post("/v1/score", content=body, headers=headers))
        await entered.wait()
        second = await client.post("/v1/score", content=body, headers=headers)
        gate.set()
        await first
    return second


async def test_an_error_the_endpoint_raises_is_answered_as_fastapi_answers_it() -> None:
    lane, documented = await _in_flight(LANE), await _in_flight(FASTAPI)
    assert lane.status_code == 409
    _same(lane, documented)


async def test_metrics_name_the_route_of_lane_answers() -> None:
    async with running() as (client, _):
        await client.post("/v1/score", json=event(1))
        text = (await client.get("/metrics")).text
    assert 'route="/v1/score"' in text
    assert 'route="unmatched",method="POST"' not in text


async def test_access_log_names_the_route_of_lane_answers(
    caplog: pytest.LogCaptureFixture,
) -> None:
    with caplog.at_level(logging.INFO, logger="emberscore.access"):
        async with running() as (client, _):
            await client.post("/v1/score", json=event(1))
    lines = [r.getMessage() for r in caplog.records if r.name == "emberscore.access"]
    assert len(lines) == 1
    assert lines[0].startswith("POST /v1/score 200 ")


SECRET = "shopper-in-the-message@quillpost.example"


async def boom() -> None:
    raise RuntimeError(SECRET)


async def _unexpected(headers: dict[str, str]) -> tuple[Any, str]:
    async with running() as (client, app):
        inject(app, {"begin": boom})
        reply = await client.post("/v1/score", content=json.dumps(event(3)), headers=headers)
        text = (await client.get("/metrics")).text
    return reply, text


async def test_unexpected_error_is_a_bare_500_on_either_path(
    caplog: pytest.LogCaptureFixture,
) -> None:
    with caplog.at_level(logging.ERROR, logger="emberscore.service"):
        (lane, lane_metrics), (documented, _) = await _unexpected(LANE), await _unexpected(FASTAPI)
    assert lane.status_code == 500
    assert lane.json() == {"detail": "internal error"}
    _same(lane, documented)
    logged = [r.getMessage() for r in caplog.records if r.name == "emberscore.service"]
    assert len(logged) == 2
    assert all("unexpected RuntimeError on /v1/score" in m for m in logged)
    assert not any(SECRET in m for m in logged)
    assert 'route="/v1/score",status="500"' in lane_metrics.replace('method="POST",', "")


async def test_oversize_score_body_is_413_declared_or_streamed() -> None:
    raw = json.dumps(event(1) | {"device_id": "d" * 20_000}).encode()

    async def streamed() -> Any:
        for i in range(0, len(raw), 1000):
            yield raw[i : i + 1000]

    async with running(settings(max_body_bytes=10_000)) as (client, _):
        replies = [
            await client.post("/v1/score", content=raw, headers=LANE),
            await client.post("/v1/score", content=streamed(), headers=LANE),
        ]
        small = await client.post("/v1/score", content=json.dumps(event(2)), headers=LANE)
    for reply in replies:
        assert reply.status_code == 413
        assert reply.json()["detail"].startswith("request body larger than 10000 bytes")
    assert small.status_code == 200


def test_plain_json_only() -> None:
    assert plain_json(b"Application/JSON ; charset=utf-8")
    assert not plain_json(b"application/vnd.emberscore+json")
    assert not plain_json(b"application/jsonx")


values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**70), max_value=2**70),
    st.floats(allow_nan=False, allow_infinity=False),
    st.text(max_size=12),
    st.sampled_from(["signup", "login", "checkout", "allow", "2090-01-01T00:00:00Z", "deny"]),
)
FIELDS = [*EventIn.model_fields, "extra_field"]


@examples(max_examples=400)
@given(
    changes=st.dictionaries(st.sampled_from(FIELDS), values, max_size=4),
    dropped=st.sets(st.sampled_from(FIELDS), max_size=2),
)
def test_lane_validation_accepts_what_fastapi_accepts(
    changes: dict[str, Any], dropped: set[str]
) -> None:
    """From a valid event, some fields changed or dropped: both accept it or both refuse."""
    body = {k: v for k, v in (event(1) | changes).items() if k not in dropped}
    raw = json.dumps(body)
    try:
        lane: EventIn | None = EventIn.model_validate_json(raw)
    except ValidationError:
        lane = None
    try:
        documented: EventIn | None = EventIn.model_validate(json.loads(raw))
    except ValidationError:
        documented = None
    assert lane == documented


@pytest.mark.parametrize(
    ("changes", "accepted"),
    [
        ({}, True),
        ({"ts": "2090-01-01T00:00:00+01:00", "amount": 3}, True),
        ({"email": None, "phone": ""}, True),
        ({"ts": 1e400}, False),  # JSON number too large for a double: refused both ways
        ({"amount": -1}, False),
        ({"account_id": 7}, False),
        ({"type": "refund"}, False),
        ({"unknown": 1}, False),
    ],
)
def test_lane_validation_examples(changes: dict[str, Any], accepted: bool) -> None:
    text = json.dumps(event(1) | changes).replace("Infinity", "1e400")  # a valid JSON number
    verdicts = []
    for validate in (EventIn.model_validate_json, lambda t: EventIn.model_validate(json.loads(t))):
        try:
            validate(text)
            verdicts.append(True)
        except ValidationError:
            verdicts.append(False)
    assert verdicts == [accepted, accepted]
