"""API keys: several at once for rotation, compared in constant time against every key.

Reference for the comparison: Python's `hmac.compare_digest` ("uses an approach designed to
prevent timing analysis", Python library documentation, hmac module).
"""

from __future__ import annotations

import logging

import pytest
from test_api_support import event, running, settings

from service import security
from service.app import create_app
from service.config import SettingsError
from service.security import ApiKeys

pytestmark = pytest.mark.anyio

KEYS = "key-one-invented,key-two-invented"


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


PROTECTED = [
    ("POST", "/v1/score", {"json": event(1)}),
    ("POST", "/v1/events", {"json": {"events": [event(2)]}}),
    (
        "POST",
        "/v1/labels",
        {"json": {"labels": [{"event_id": "x", "labeled_at": 1e9, "is_fraud": 0}]}},
    ),
    ("GET", "/v1/reputation/device/dev-alpha", {}),
    ("DELETE", "/v1/reputation/device/dev-alpha", {}),
]


@pytest.mark.parametrize(
    ("method", "path", "extra"), PROTECTED, ids=[p[1] + p[0] for p in PROTECTED]
)
@pytest.mark.parametrize("key", [None, "key-three-invented", "key-one", ""])
async def test_missing_or_wrong_key_is_a_bare_401(
    method: str, path: str, extra: dict[str, object], key: str | None
) -> None:
    headers = {} if key is None else {"X-API-Key": key}
    async with running(settings(api_keys=KEYS)) as (client, _):
        reply = await client.request(method, path, headers=headers, **extra)  # type: ignore[arg-type]
    assert reply.status_code == 401
    assert reply.json() == {"detail": "unauthorized"}


@pytest.mark.parametrize("key", KEYS.split(","))
async def test_either_configured_key_is_accepted(key: str) -> None:
    async with running(settings(api_keys=KEYS), headers={"X-API-Key": key}) as (client, _):
        scored = await client.post("/v1/score", json=event(1))
        looked = await client.get("/v1/reputation/device/dev-alpha")
    assert scored.status_code == 200
    assert looked.status_code == 200


async def test_operations_endpoints_need_no_key() -> None:
    async with running(settings(api_keys=KEYS)) as (client, _):
        for path in ("/healthz", "/readyz", "/metrics", "/docs", "/openapi.json"):
            assert (await client.get(path)).status_code == 200, path


async def test_development_mode_without_keys_needs_none_and_says_so(
    caplog: pytest.LogCaptureFixture,
) -> None:
    with caplog.at_level(logging.WARNING, logger="emberscore"):
        async with running(settings()) as (client, _):
            reply = await client.post("/v1/score", json=event(1))
    assert reply.status_code == 200
    assert "no API keys configured (development mode): requests need no key" in caplog.text


def test_production_refuses_to_start_without_keys_secret_or_redis() -> None:
    with pytest.raises(SettingsError) as caught:
        create_app(
            settings(mode="production", hash_secret="emberscore-development-secret-do-not-use")
        )
    message = str(caught.value)
    assert "EMBERSCORE_HASH_SECRET" in message
    assert "EMBERSCORE_API_KEYS" in message
    assert "EMBERSCORE_REDIS_URL" in message


def test_every_key_is_compared_whatever_matches(monkeypatch: pytest.MonkeyPatch) -> None:
    """No early exit: a match on the first key still compares the others (a spy that calls the
    real `hmac.compare_digest`)."""
    compared: list[bytes] = []
    real = security.hmac.compare_digest

    def spy(a: bytes, b: bytes) -> bool:
        compared.append(b)
        return real(a, b)

    monkeypatch.setattr(security.hmac, "compare_digest", spy)
    keys = ApiKeys(["first-key", "second-key", "third-key"])
    assert keys.accepts("first-key")
    assert compared == [b"first-key", b"second-key", b"third-key"]
    compared.clear()
    assert not keys.accepts("no-such-key")
    assert len(compared) == 3


def test_keys_from_the_environment_are_split_on_commas(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("EMBERSCORE_API_KEYS", " key-a , key-b ")
    keys = [k.get_secret_value() for k in settings().api_keys]
    assert keys == ["key-a", "key-b"]
