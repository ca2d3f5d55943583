"""Error answers: every refusal names the field and the reason in plain words, never a traceback.

A 422 body is ``{"detail": [{"field": "events[3].ts", "reason": "..."}]}``. Pydantic's own
messages are reworded by error type, and the offending values are not echoed back (they may be
identifiers). Unexpected errors give a bare 500; the log gets the error type and the traceback's
frames, not the error's message, which could quote a value.
"""

from __future__ import annotations

import logging
import traceback
from collections.abc import Mapping, Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.routes.deps import FieldError

log = logging.getLogger("emberscore.service")
_SOURCES = ("body", "query", "path", "header", "cookie")


def field_name(loc: Sequence[int | str]) -> str:
    """``("body", "events", 3, "ts")`` → ``"events[3].ts"``.

    >>> field_name(("body", "events", 3, "ts")), field_name(("body",)), field_name(("path", "kind"))
    ('events[3].ts', 'body', 'kind')
    """
    parts = list(loc[1:] if loc and loc[0] in _SOURCES else loc)
    text = ""
    for part in parts:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text or "body"


def _number(value: object) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


_REASONS: dict[str, str] = {
    "missing": "is required",
    "extra_forbidden": "is not a known field",
    "string_type": "must be text",
    "float_type": "must be a number",
    "int_type": "must be a whole number",
    "bool_type": "must be true or false",
    "finite_number": "must be a finite number",
    "model_type": "must be a JSON object",
    "model_attributes_type": "must be a JSON object",
    "dict_type": "must be a JSON object",
    "list_type": "must be a JSON list",
}


def reason(error: Mapping[str, Any]) -> str:
    """Plain words for one pydantic error (without the input value)."""
    kind = str(error.get("type", ""))
    ctx = error.get("ctx") or {}
    if kind in _REASONS:
        return _REASONS[kind]
    if kind == "value_error":
        return str(ctx.get("error", error.get("msg", "")))
    if kind == "literal_error":
        return f"must be one of {ctx.get('expected')}"
    if kind == "greater_than_equal":
        return f"must be at least {_number(ctx.get('ge'))}"
    if kind == "string_too_short":
        n = ctx.get("min_length", 1)
        return "must not be empty" if n == 1 else f"must be at least {n} characters"
    if kind == "string_too_long":
        return f"must be at most {ctx.get('max_length')} characters"
    if kind == "too_short":
        return f"must hold at least {ctx.get('min_length')} item(s)"
    if kind == "json_invalid":
        loc = error.get("loc", ())
        at = f" at character {loc[-1]}" if loc and isinstance(loc[-1], int) else ""
        return f"is not valid JSON ({ctx.get('error', 'decode error')}{at})"
    return str(error.get("msg", "is not valid"))


def _field(error: Mapping[str, Any]) -> str:
    if error.get("type") == "json_invalid":  # its location is a character position
        return "body"
    return field_name(error.get("loc", ()))


async def _validation(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    problems = [{"field": _field(e), "reason": reason(e)} for e in exc.errors()]
    return JSONResponse({"detail": problems}, status_code=422)


async def _field_problem(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, FieldError)
    return JSONResponse({"detail": [{"field": exc.field, "reason": exc.reason}]}, status_code=422)


def install(app: FastAPI) -> None:
    """Register the 422 handlers on ``app``."""
    app.add_exception_handler(RequestValidationError, _validation)
    app.add_exception_handler(FieldError, _field_problem)


def log_unexpected(scope: Scope, exc: BaseException) -> None:
    """Log an unexpected error with its type, route template and traceback frames, not its
    message (which could quote a value)."""
    route = getattr(scope.get("route"), "path", "unmatched")
    frames = "".join(traceback.format_tb(exc.__traceback__))
    log.error("unexpected %s on %s\n%s", type(exc).__name__, route, frames)


async def send_internal_error(send: Send) -> int:
    """Send the bare 500 answer; its status."""
    response = JSONResponse({"detail": "internal error"}, status_code=500)
    await send({"type": "http.response.start", "status": 500, "headers": response.raw_headers})
    await send({"type": "http.response.body", "body": response.body})
    return 500


class ContainErrors:
    """ASGI middleware: an unexpected error becomes a bare 500, logged without its message."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def send_and_note(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, send_and_note)
        except Exception as exc:
            log_unexpected(scope, exc)
            if not started:
                await send_internal_error(send)
