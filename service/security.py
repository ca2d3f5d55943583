"""API keys and request-size protection.

Keys travel in the ``X-API-Key`` header. Several keys can be valid at once
(``EMBERSCORE_API_KEYS=k1,k2``) so that a key can be rotated without downtime: add the new key,
move the callers, remove the old one. A presented key is compared with every configured key by
`hmac.compare_digest`, without stopping at the first match, so the time taken says nothing about
which key matched or how much of one did. A refusal is a bare 401 that does not say what was wrong.

With no keys configured (development mode only: production refuses to start without keys), no
key is required; the service says so when it starts.
"""

from __future__ import annotations

import hmac
import json
from collections.abc import Iterable

from fastapi import HTTPException, Request, status
from fastapi.security import APIKeyHeader
from starlette.types import ASGIApp, Message, Receive, Scope, Send

API_KEY_HEADER = "X-API-Key"

api_key_header = APIKeyHeader(
    name=API_KEY_HEADER,
    auto_error=False,
    description="One of the keys in EMBERSCORE_API_KEYS (not required when none are configured)",
)


class ApiKeys:
    """The accepted API keys.

    >>> keys = ApiKeys(["old-key", "new-key"])
    >>> keys.accepts("new-key"), keys.accepts("new-ke"), keys.accepts(None)
    (True, False, False)
    >>> ApiKeys([]).accepts(None)   # none configured: development mode, no key needed
    True
    """

    def __init__(self, keys: Iterable[str]) -> None:
        self._keys = [k.encode() for k in keys if k]

    @property
    def required(self) -> bool:
        return bool(self._keys)

    def accepts(self, presented: str | None) -> bool:
        if not self._keys:
            return True
        if presented is None:
            return False
        candidate = presented.encode()
        matched = False
        for key in self._keys:  # every key, every time: no early exit
            matched |= hmac.compare_digest(candidate, key)
        return matched


def check_api_key(request: Request, presented: str | None) -> None:
    """Raise 401 unless the request carries an accepted key (the app's `ApiKeys`)."""
    keys: ApiKeys = request.app.state.api_keys
    if not keys.accepts(presented):
        raise HTTPException(
            status.HTTP_401_UNAUTHORIZED,
            "unauthorized",
            headers={"WWW-Authenticate": API_KEY_HEADER},
        )


class BodySizeLimit:
    """ASGI middleware: refuse (413) request bodies larger than ``max_body_bytes``.

    The body is read here, up to the limit, before the application sees any of it, so an
    oversize request is refused whether or not it declares its length and whatever route it
    targets, and the application never holds more than the limit. The body read is replayed to
    the application.
    """

    def __init__(self, app: ASGIApp, max_body_bytes: int) -> None:
        self.app = app
        self.max_body_bytes = max_body_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = declared_length(scope)
        if declared is not None and declared > self.max_body_bytes:
            await self._refuse(send)
            return
        try:
            body = await read_body(receive, self.max_body_bytes)
        except BodyTooLarge:
            await self._refuse(send)
            return
        if body is None:  # the client went away
            return
        await self.app(scope, replay(body, receive), send)

    async def _refuse(self, send: Send) -> None:
        await refuse_too_large(send, self.max_body_bytes)


async def refuse_too_large(send: Send, max_body_bytes: int) -> None:
    """Send the 413 answer for a body larger than ``max_body_bytes`` (and close the connection)."""
    body = json.dumps(
        {"detail": f"request body larger than {max_body_bytes} bytes: send fewer items per request"}
    ).encode()
    await send(
        {
            "type": "http.response.start",
            "status": 413,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(body)).encode()),
                (b"connection", b"close"),
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})


def declared_length(scope: Scope) -> int | None:
    """The request's ``Content-Length``, or None when it has none (or not a number)."""
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


class BodyTooLarge(Exception):
    """A request body went past the limit (reading stopped there)."""


async def read_body(receive: Receive, limit: int | None = None) -> bytes | None:
    """The whole request body, or None if the client disconnected first; `BodyTooLarge` past
    ``limit`` bytes."""
    chunks: list[bytes] = []
    size = 0
    while True:
        message = await receive()
        if message["type"] == "http.disconnect":
            return None
        chunk = message.get("body", b"")
        size += len(chunk)
        if limit is not None and size > limit:
            raise BodyTooLarge(f"more than {limit} bytes")
        chunks.append(chunk)
        if not message.get("more_body", False):
            return chunks[0] if len(chunks) == 1 else b"".join(chunks)


def replay(body: bytes, receive: Receive) -> Receive:
    """A ``receive`` that gives ``body`` once, then defers to the server's own."""
    sent = False

    async def replayed() -> Message:
        nonlocal sent
        if sent:
            return await receive()  # after the body: wait for the disconnect, as the server would
        sent = True
        return {"type": "http.request", "body": body, "more_body": False}

    return replayed
