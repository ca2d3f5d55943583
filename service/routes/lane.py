"""The fast lane: the common case of the event routes, answered before FastAPI's stack.

A scored event is most of the service's traffic, and each would pass through the same steps
whose cost FastAPI and Starlette spend on generality: their outer middlewares (error pages,
optional telemetry, their own body limit), the service's three middlewares (request metrics,
body-size limit, error containment), each wrapping ``send`` once more, then matching the path
against every route, a `Request` object and two exit stacks per request, dependency injection
(a plain ``def`` dependency costs a hop to a worker thread), and validating the answer again
against the ``response_model``. At 1,000 requests/s on two cores these layers were about a
tenth of a worker's CPU (py-spy profile of a served worker).

`ServiceApp` (`service.app`) hands ``POST`` to an event route (``/v1/score``, and the
benchmark's ``/v1/reference``) to `EventLane.answer` before anything else runs. The lane
answers it itself when the request has

- a declared ``Content-Length`` within the body limit,
- an accepted API key (or none is configured),
- a ``Content-Type`` of ``application/json`` (parameters such as charset allowed), and
- a body `EventIn` accepts, validated straight from the bytes (``EventIn.model_validate_json``):

it calls the route's endpoint as ``endpoint(body=..., runtime=...)`` and sends the `Response`
the endpoint returns (its background task included), doing what the service's middlewares
would have done: the request is timed and access-logged by its route template
(`Metrics.finish_request`), and an unexpected error is logged without its message and becomes
a bare 500 (`service.routes.errors.log_unexpected`). An `HTTPException` raised by the endpoint
(409, 503) is answered by the application's own handler for it. Anything else goes to FastAPI
with the body it has read, unchanged, so every refusal (401, 413, 422...) is FastAPI's answer,
word for word, and the routes stay declared (and documented in OpenAPI) as FastAPI routes with
the same endpoints.
"""

from __future__ import annotations

import time
from collections.abc import Awaitable, Callable, Mapping
from dataclasses import dataclass
from typing import Any

from fastapi import Request, Response
from pydantic import ValidationError
from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api_models import EventIn
from service.metrics import Metrics
from service.routes.errors import log_unexpected, send_internal_error
from service.security import (
    API_KEY_HEADER,
    BodyTooLarge,
    declared_length,
    read_body,
    refuse_too_large,
    replay,
)

Endpoint = Callable[..., Awaitable[Response]]
JSON_TYPE = "application/json"
_KEY_HEADER = API_KEY_HEADER.lower().encode()


@dataclass(frozen=True)
class RouteTemplate:
    """What `scope["route"]` holds for a request the lane answered (its ``path`` is read by the
    request metrics, as a FastAPI route's would be)."""

    path: str


def plain_json(content_type: bytes | None) -> bool:
    """Whether a ``Content-Type`` is ``application/json`` (parameters such as charset allowed).

    >>> plain_json(b"application/json; charset=utf-8"), plain_json(b"text/plain"), plain_json(None)
    (True, False, False)
    """
    if content_type is None:
        return False
    return content_type.partition(b";")[0].strip().lower() == JSON_TYPE.encode()


def _headers(scope: Scope) -> tuple[bytes | None, bytes | None]:
    """The request's API key and content type (the first of each, as Starlette's `Headers`)."""
    key = content_type = None
    for name, value in scope["headers"]:
        if name == _KEY_HEADER and key is None:
            key = value
        elif name == b"content-type" and content_type is None:
            content_type = value
    return key, content_type


def common_case(app: Any, scope: Scope, body: bytes) -> EventIn | None:
    """The request's event when the lane may answer it, else None (FastAPI answers)."""
    key, content_type = _headers(scope)
    if app.state.api_keys.required and (
        key is None or not app.state.api_keys.accepts(key.decode("latin-1"))
    ):
        return None
    if not plain_json(content_type):
        return None
    try:
        return EventIn.model_validate_json(body)
    except ValidationError:
        return None


def _route_path(scope: Scope) -> str:
    path: str = scope["path"]
    root: str = scope.get("root_path", "")
    return path[len(root) :] if root and path.startswith(root) else path


class EventLane:
    """Answers the common case of the event routes (see the module); ``endpoints`` maps a
    route's path to its endpoint."""

    def __init__(
        self, endpoints: Mapping[str, Endpoint], metrics: Metrics, max_body_bytes: int
    ) -> None:
        self.endpoints = dict(endpoints)
        self.templates = {path: RouteTemplate(path) for path in endpoints}
        self.metrics = metrics
        self.max_body_bytes = max_body_bytes

    def route_for(self, scope: Scope) -> str | None:
        """The event route (path) the request is for, else None (FastAPI answers)."""
        if scope["type"] != "http" or scope["method"] != "POST":
            return None
        path = _route_path(scope)
        return path if path in self.endpoints else None

    async def answer(
        self,
        app: Any,
        path: str,
        scope: Scope,
        receive: Receive,
        send: Send,
        rest: ASGIApp,
    ) -> None:
        """Answer the request, or pass it to ``rest`` (FastAPI) when it is not the common case."""
        declared = declared_length(scope)
        if declared is None or declared > self.max_body_bytes:
            await rest(scope, receive, send)  # chunked or oversize: the middlewares' business
            return
        started = time.perf_counter()
        try:
            body = await read_body(receive, self.max_body_bytes)
        except BodyTooLarge:  # more bytes than declared: no HTTP/1.1 server passes that on
            await refuse_too_large(send, self.max_body_bytes)
            return
        if body is None:  # the client went away
            return
        event = common_case(app, scope, body)
        if event is None:
            await rest(scope, replay(body, receive), send)
            return
        scope["app"] = app
        scope["route"] = self.templates[path]
        status = 500
        try:
            status = await self._send(app, scope, self.endpoints[path], event, send)
        finally:
            self.metrics.finish_request(path, "POST", status, time.perf_counter() - started)

    async def _send(
        self, app: Any, scope: Scope, endpoint: Endpoint, event: EventIn, send: Send
    ) -> int:
        """Send the endpoint's answer, then run its background task; the status sent."""
        status, response_started = 500, False
        try:
            response = await self._answer(app, scope, endpoint, event)
            status = response.status_code
            headers = response.raw_headers
            await send({"type": "http.response.start", "status": status, "headers": headers})
            response_started = True
            await send({"type": "http.response.body", "body": response.body})
            if response.background is not None:
                await response.background()
        except Exception as exc:  # as `ContainErrors` does for the routes FastAPI answers
            log_unexpected(scope, exc)
            if not response_started:
                status = await send_internal_error(send)
        return status

    async def _answer(self, app: Any, scope: Scope, endpoint: Endpoint, event: EventIn) -> Response:
        try:
            return await endpoint(body=event, runtime=app.state.runtime)
        except HTTPException as exc:  # the application's handler, found as Starlette finds it
            handlers = app.exception_handlers
            cls = next(c for c in type(exc).__mro__ if c in handlers)
            handler: Callable[[Request, Exception], Awaitable[Response]] = handlers[cls]
            return await handler(Request(scope), exc)
