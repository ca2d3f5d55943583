"""Refused requests: every 422 names the field and the reason in plain words, without a traceback.

Times go through the files' conformance table (tests/data/files/iso_times.csv: each row names its
rule, an RFC 3339 or ISO 8601 section), so the API accepts and refuses exactly what files do, with
the same words.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

import pyarrow as pa
import pytest
from test_api_support import event, running, settings

from service.files_times import NO_ZONE, parse_times

pytestmark = pytest.mark.anyio

TIMES = Path(__file__).parents[1] / "data" / "files" / "iso_times.csv"
TIME_ROWS = list(csv.DictReader(TIMES.open(encoding="utf-8")))
REMOVE = object()


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _with(**changes: Any) -> dict[str, Any]:
    body = event(1)
    for name, value in changes.items():
        if value is REMOVE:
            body.pop(name)
        else:
            body[name] = value
    return body


# (case, body, field, words the reason must contain)
CASES: list[tuple[str, dict[str, Any], str, str]] = [
    ("bad ts", _with(ts="next tuesday"), "ts", "not an ISO 8601 time with a zone"),
    ("naive ts", _with(ts="2090-01-01T10:00:00"), "ts", NO_ZONE),
    ("ts in milliseconds", _with(ts=3_786_912_000_000), "ts", "milliseconds given?"),
    ("ts true", _with(ts=True), "ts", "ISO 8601 text with a zone or epoch seconds"),
    ("unknown type", _with(type="refund"), "type", "must be one of 'signup', 'login'"),
    ("negative amount", _with(amount=-0.01), "amount", "must be at least 0"),
    ("amount as text", _with(amount="12.50"), "amount", "must be a number"),
    ("missing event_id", _with(event_id=REMOVE), "event_id", "is required"),
    ("empty event_id", _with(event_id=""), "event_id", "must not be empty"),
    ("event_id a number", _with(event_id=1234), "event_id", "must be text"),
    ("phone a number", _with(phone=442079460321), "phone", "must be text"),
    ("unknown field", _with(colour="blue"), "colour", "is not a known field"),
    ("unknown decision", _with(current_decision="maybe"), "current_decision", "must be one of"),
    ("missing type", _with(type=REMOVE), "type", "is required"),
]


@pytest.mark.parametrize(("case", "body", "field", "words"), CASES, ids=[c[0] for c in CASES])
async def test_score_refusals_name_field_and_reason(
    case: str, body: dict[str, Any], field: str, words: str
) -> None:
    async with running() as (client, _):
        reply = await client.post("/v1/score", json=body)
    assert reply.status_code == 422, case
    problems = reply.json()["detail"]
    assert [p["field"] for p in problems] == [field]
    assert words in problems[0]["reason"]
    assert "Traceback" not in reply.text


async def test_refusals_do_not_echo_values() -> None:
    secret_looking = "victim@quillpost.example"
    async with running() as (client, _):
        reply = await client.post("/v1/score", json=_with(email=7, ts=secret_looking))
    assert secret_looking not in reply.text
    assert {p["field"] for p in reply.json()["detail"]} == {"email", "ts"}


async def test_nan_amount_is_refused() -> None:
    text = json.dumps(event(1)).replace("42.5", "NaN")
    async with running() as (client, _):
        reply = await client.post(
            "/v1/score", content=text, headers={"content-type": "application/json"}
        )
    assert reply.status_code == 422
    assert reply.json()["detail"] == [{"field": "amount", "reason": "must be a finite number"}]


async def test_body_that_is_not_json_or_not_an_object() -> None:
    async with running() as (client, _):
        broken = await client.post(
            "/v1/score", content=b'{"event_id": ', headers={"content-type": "application/json"}
        )
        listed = await client.post("/v1/score", json=[event(1)])
    assert broken.status_code == 422
    assert broken.json()["detail"][0]["field"] == "body"
    assert broken.json()["detail"][0]["reason"].startswith("is not valid JSON")
    assert listed.json()["detail"] == [{"field": "body", "reason": "must be a JSON object"}]


async def test_batch_items_are_named_by_position() -> None:
    events = [event(n) for n in range(3)]
    events[2]["ts"] = "2090-01-01"
    labels = [{"event_id": "ev-1", "labeled_at": T, "is_fraud": "yes"} for T in (1.0e9,)]
    async with running() as (client, _):
        bad_events = await client.post("/v1/events", json={"events": events})
        bad_labels = await client.post("/v1/labels", json={"labels": labels})
        empty = await client.post("/v1/events", json={"events": []})
    assert bad_events.json()["detail"] == [{"field": "events[2].ts", "reason": NO_ZONE}]
    assert bad_labels.json()["detail"] == [
        {"field": "labels[0].is_fraud", "reason": "must be true or false (or 1 or 0)"}
    ]
    assert empty.json()["detail"] == [{"field": "events", "reason": "must hold at least 1 item(s)"}]


async def test_oversize_batch_is_422_naming_the_field() -> None:
    async with running(settings(max_batch=3)) as (client, _):
        events = await client.post("/v1/events", json={"events": [event(n) for n in range(4)]})
        labels = await client.post(
            "/v1/labels",
            json={
                "labels": [
                    {"event_id": f"e{n}", "labeled_at": 1e9, "is_fraud": 1} for n in range(4)
                ]
            },
        )
    assert events.status_code == 422
    assert events.json()["detail"] == [
        {
            "field": "events",
            "reason": "4 items is more than the 3 allowed per request: split the batch",
        }
    ]
    assert labels.json()["detail"][0]["field"] == "labels"


async def test_oversize_body_is_413_declared_or_streamed() -> None:
    big = {"events": [event(n) for n in range(200)]}
    raw = json.dumps(big).encode()

    async def chunks() -> Any:
        for i in range(0, len(raw), 1000):
            yield raw[i : i + 1000]

    async with running(settings(max_body_bytes=10_000)) as (client, _):
        declared = await client.post("/v1/events", json=big)
        streamed = await client.post(
            "/v1/events", content=chunks(), headers={"content-type": "application/json"}
        )
        small = await client.post("/v1/events", json={"events": [event(1)]})
    for reply in (declared, streamed):
        assert reply.status_code == 413
        assert reply.json()["detail"].startswith("request body larger than 10000 bytes")
    assert small.status_code == 200


@pytest.mark.parametrize("row", TIME_ROWS, ids=[r["text"] for r in TIME_ROWS])
async def test_times_follow_the_files_conformance_table(row: dict[str, str]) -> None:
    """Source per row: the table's `source` column. Text rows are sent as JSON strings."""
    seconds, bad = parse_times(pa.array([row["text"]]))
    async with running() as (client, _):
        reply = await client.post("/v1/score", json=_with(ts=row["text"], event_id=row["text"]))
    if row["expect"] == "ok":
        assert reply.status_code == 200
        async with running() as (client, _):  # the same instant as epoch seconds: same answer
            twin = await client.post(
                "/v1/score", json=_with(ts=float(seconds[0]), event_id=row["text"])
            )
        assert twin.json() == reply.json()
    else:
        assert reply.status_code == 422
        assert reply.json()["detail"] == [{"field": "ts", "reason": bad[0]}]
