"""The fast lane: the common case of the event routes, answered without FastAPI's routing.

A scored event is most of the service's traffic, and each passes through the same steps whose
cost FastAPI spends on generality: matching the path against every route, a `Request` object
and two exit stacks per request, dependency injection (a plain ``def`` dependency costs a hop to
a worker thread), reading the body through the request, validating the answer again against the
``response_model``. `EventLane` is the innermost of the service's own middlewares (so the
request metrics, the access log, the body-size limit and error containment apply unchanged) and
handles ``POST`` to the event routes (``/v1/score``, and the benchmark's ``/v1/reference``)
itself when the request has

- an accepted API key (or none is configured),
- a ``Content-Type`` of ``application/json`` (parameters such as charset allowed), and
- a body `EventIn` accepts, validated straight from the bytes (``EventIn.model_validate_json``):

it calls the route's endpoint as ``endpoint(body=..., runtime=...)`` and sends the `Response`
the endpoint returns (its background task included). An `HTTPException` raised by the endpoint
(409, 503) is answered by the application's own handler for it. Anything else goes on to FastAPI
unchanged, so every refusal (401, 422...) is FastAPI's answer, word for word, and the routes
stay declared (and documented in OpenAPI) as FastAPI routes with the same endpoints.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Mapping
from dataclasses import dataclass
from typing import Any

from fastapi import Request, Response
from pydantic import ValidationError
from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api_models import EventIn
from service.security import API_KEY_HEADER, BODY_SCOPE_KEY, read_body, replay

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
    """ASGI middleware; ``endpoints`` maps a route's path to its endpoint (see the module)."""

    def __init__(self, app: ASGIApp, endpoints: Mapping[str, Endpoint]) -> None:
        self.app = app
        self.endpoints = dict(endpoints)
        self.templates = {path: RouteTemplate(path) for path in endpoints}

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] != "POST":
            await self.app(scope, receive, send)
            return
        path = _route_path(scope)
        endpoint = self.endpoints.get(path)
        if endpoint is None:
            await self.app(scope, receive, send)
            return
        body = scope.get(BODY_SCOPE_KEY)
        if body is None:
            body = await read_body(receive)
            if body is None:  # the client went away
                return
            receive = replay(body, receive)
        app = scope["app"]
        event = common_case(app, scope, body)
        if event is None:
            await self.app(scope, receive, send)
            return
        scope["route"] = self.templates[path]
        response = await self._answer(app, scope, endpoint, event)
        await response(scope, receive, send)

    async def _answer(self, app: Any, scope: Scope, endpoint: Endpoint, event: EventIn) -> Response:
        try:
            return await endpoint(body=event, runtime=app.state.runtime)
        except HTTPException as exc:  # the application's handler, found as Starlette finds it
            handlers = app.exception_handlers
            cls = next(c for c in type(exc).__mro__ if c in handlers)
            handler: Callable[[Request, Exception], Awaitable[Response]] = handlers[cls]
            return await handler(Request(scope), exc)
