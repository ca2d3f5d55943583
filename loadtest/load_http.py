"""The load generator's I/O seam: a local target, request bytes, one keep-alive connection.

Only what the generator needs of HTTP/1.1 is here: a POST with a JSON body on a persistent
connection, and reading the answer's status line, headers and body (Content-Length or chunked).
No client library sits in the hot loop: a request is a few byte joins, an answer two stream reads.

Request bodies are events from the demo scenario generator with fresh event ids. They are prepared
before a run as JSON text lacking only the event time, which is written at send time (the intended
send time, as epoch seconds with three decimals), so the service sees live traffic.
"""

from __future__ import annotations

import asyncio
import json
import math
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlsplit

from service.scenario import ScenarioParams, generate

LOCAL_HOSTS = ("127.0.0.1", "::1", "localhost")
EVENT_FIELDS = ("type", "account_id", "ip", "device_id", "phone", "email", "amount")
HEAD_LIMIT = 64 * 1024


class LoadError(Exception):
    """A problem with the options or the target that the user can fix (printed, no traceback)."""


class NonLocalTargetError(LoadError):
    """The target is not this machine: the generator only loads 127.0.0.1, ::1 or localhost."""


class ProtocolError(Exception):
    """The server's answer is not HTTP/1.1 as expected (counted as an error, not raised)."""


@dataclass(frozen=True)
class Target:
    """Where requests go: a loopback host, a port and a path."""

    host: str
    port: int
    path: str

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}{self.path}"


def parse_target(url: str) -> Target:
    """Parse ``http://<loopback host>[:port]/path``; refuse any other host or scheme.

    >>> parse_target("http://127.0.0.1:8080/v1/score")
    Target(host='127.0.0.1', port=8080, path='/v1/score')
    """
    parts = urlsplit(url)
    if parts.scheme != "http":
        raise LoadError(f"target must start with http:// (plain HTTP on this machine), got {url!r}")
    host = parts.hostname or ""
    if host not in LOCAL_HOSTS or parts.username is not None or parts.password is not None:
        raise NonLocalTargetError(
            f"refusing to send load to {host or url!r}: the generator targets this machine only "
            f"(one of {', '.join(LOCAL_HOSTS)})"
        )
    try:
        port = parts.port or 80
    except ValueError as exc:
        raise LoadError(f"bad port in {url!r}") from exc
    path = parts.path or "/"
    if parts.query:
        path += "?" + parts.query
    return Target(host, port, path)


def request_head(target: Target, api_key: str | None = None) -> bytes:
    """Request line and fixed headers, ending just before the Content-Length value."""
    lines = [
        f"POST {target.path} HTTP/1.1",
        f"Host: {target.url.split('/')[2]}",
        "Content-Type: application/json",
        "Connection: keep-alive",
    ]
    if api_key:
        lines.append(f"X-API-Key: {api_key}")
    return ("\r\n".join(lines) + "\r\nContent-Length: ").encode()


def event_time_text(ts_s: float) -> bytes:
    """Epoch seconds with three decimals, as written into each body at send time."""
    return f"{ts_s:.3f}".encode()


def full_request(head: bytes, body_prefix: bytes, ts_s: float) -> bytes:
    """The bytes of one request: ``head``, the length, and the body with its event time."""
    body = body_prefix + event_time_text(ts_s) + b"}"
    return head + str(len(body)).encode() + b"\r\n\r\n" + body


def scenario_events(
    n_distinct: int, seed: int = 7, with_current_decision: bool = False
) -> list[dict[str, Any]]:
    """Events (without id or time) from the demo scenario generator, in its time order.

    ``with_current_decision`` adds the rules' decision, as a caller in shadow mode sends it.
    """
    events = generate(ScenarioParams(n_events=max(1_000, n_distinct), seed=seed)).events
    names = (*EVENT_FIELDS, "current_decision") if with_current_decision else EVENT_FIELDS
    rows: list[dict[str, Any]] = []
    for i in range(len(events)):
        row: dict[str, Any] = {}
        for name in names:
            value = getattr(events, name)[i]
            if name == "amount":
                value = None if math.isnan(value) else float(value)
            if value is not None:
                row[name] = value
        rows.append(row)
    return rows


def body_prefixes(events: list[dict[str, Any]], n: int, run_tag: str) -> list[bytes]:
    """``n`` JSON bodies lacking the closing ``"ts":<value>}``, cycling through ``events``.

    Each body gets a fresh event id ``lt-<run_tag>-<i>`` so that no request is a retry.

    >>> body_prefixes([{"type": "login"}], 2, "t0")[1]
    b'{"event_id":"lt-t0-00000001","type":"login","ts":'
    """
    if not events:
        raise LoadError("no events to send")
    out = []
    for i in range(n):
        row = {"event_id": f"lt-{run_tag}-{i:08d}", **events[i % len(events)]}
        out.append(json.dumps(row, separators=(",", ":"))[:-1].encode() + b',"ts":')
    return out


def _parse_head(head: bytes) -> tuple[int, int | None, bool]:
    """Status, Content-Length (None when chunked) and whether the server closes the connection."""
    if not head.startswith(b"HTTP/1.") or len(head) < 12:
        raise ProtocolError("answer does not start with an HTTP/1.x status line")
    status = int(head[9:12])
    length: int | None = 0
    close = head.startswith(b"HTTP/1.0")
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        name = name.strip().lower()
        if name == b"content-length":
            length = int(value)
        elif name == b"transfer-encoding" and b"chunked" in value.lower():
            length = None
        elif name == b"connection":
            close = value.strip().lower() == b"close"
    return status, length, close


class Connection:
    """One persistent HTTP/1.1 connection; `exchange` sends a request and reads the answer."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader = reader
        self.writer = writer
        self.closed = False

    @classmethod
    async def open(cls, target: Target) -> Connection:
        reader, writer = await asyncio.open_connection(target.host, target.port, limit=HEAD_LIMIT)
        return cls(reader, writer)

    async def exchange(self, data: bytes) -> tuple[int, bytes]:
        """Send one request and read its whole answer; return the status code and the body."""
        self.writer.write(data)
        try:
            head = await self.reader.readuntil(b"\r\n\r\n")
        except asyncio.LimitOverrunError as exc:
            raise ProtocolError("answer headers too long") from exc
        status, length, close = _parse_head(head)
        if length is None:
            body = await self._read_chunked()
        else:
            body = await self.reader.readexactly(length) if length else b""
        if close:
            self.close()
        return status, body

    async def _read_chunked(self) -> bytes:
        parts: list[bytes] = []
        while True:
            size = int((await self.reader.readuntil(b"\r\n")).split(b";")[0], 16)
            if size == 0:
                while (await self.reader.readuntil(b"\r\n")) != b"\r\n":
                    pass  # trailers, if any, end with an empty line
                return b"".join(parts)
            parts.append((await self.reader.readexactly(size + 2))[:-2])

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self.writer.close()
