"""The stream-shaped parts of the Redis store: record lookup, maturity queue, labels, shadow log.

Each function takes the client and the time limit of one exchange, and raises only
`StoreUnavailable`. Streams are read in pages so that no reply is unbounded.
"""

from __future__ import annotations

import contextlib
from collections.abc import AsyncGenerator, Sequence
from typing import Any

import numpy as np
from redis.exceptions import ResponseError

from service.stores.base import Matured
from service.stores.redis_client import Client, guard
from service.stores.redis_keys import (
    LABEL_GROUP,
    LABEL_QUEUE_KEY,
    MATURE_KEY,
    SHADOW_KEY,
    decode_maturity,
    stream_ids_after,
    text_fields,
)
from service.tables import ScoreTable

PAGE = 1000
SHADOW_PAGE = 10_000


def _text(value: bytes | str) -> str:
    return value.decode() if isinstance(value, bytes) else value


Entry = tuple[bytes, dict[bytes, bytes]]


async def _pages(
    client: Client, key: str, what: str, timeout_s: float, page: int = PAGE
) -> AsyncGenerator[list[Entry], None]:
    """A stream's entries, oldest first, ``page`` at a time (one exchange each)."""
    start = "-"
    while True:
        async with guard(what, timeout_s):
            entries: Any = await client.xrange(key, start, "+", count=page)
        yield entries
        if len(entries) < page:
            return
        start = "(" + _text(entries[-1][0])


async def find_record(
    client: Client, key: str, event_digest: bytes, timeout_s: float
) -> bytes | None:
    """The learning record of ``event_digest`` in the shard stream ``key``, or None."""
    async with contextlib.aclosing(_pages(client, key, "a record lookup", timeout_s)) as pages:
        async for entries in pages:
            for _, fields in entries:
                record = fields.get(event_digest)
                if record is not None:
                    return bytes(record)
    return None


async def read_due(
    client: Client, until_s: float, timeout_s: float
) -> tuple[list[Matured], str | None, float | None]:
    """Due entries from the head of the maturity queue, in queue order.

    Returns the entries whose maturity time is at or before ``until_s`` up to the first that is
    not (a late entry behind a later one waits for it: queue order is arrival order), the id of
    the last one returned, and the maturity time of the first entry left (None: queue empty).
    """
    out: list[Matured] = []
    last: str | None = None
    pages = _pages(client, MATURE_KEY, "a maturity-queue read", timeout_s)
    async with contextlib.aclosing(pages):
        async for entries in pages:
            for entry_id, fields in entries:
                ((digest, value),) = fields.items()
                mature_at_s, record = decode_maturity(value)
                if mature_at_s > until_s:
                    return out, last, mature_at_s
                out.append(Matured(bytes(digest), record))
                last = _text(entry_id)
    return out, last, None


async def consume_due(client: Client, last: str, timeout_s: float) -> None:
    """Drop the maturity queue's entries up to and including ``last`` (the learner's cursor)."""
    async with guard("a maturity-queue trim", timeout_s):
        await client.xtrim(MATURE_KEY, minid=stream_ids_after(last), approximate=False)


async def ensure_label_group(client: Client, timeout_s: float) -> None:
    """Create the learners' consumer group on the label queue unless it exists."""
    async with guard("creating the label consumer group", timeout_s):
        try:
            await client.xgroup_create(LABEL_QUEUE_KEY, LABEL_GROUP, id="0", mkstream=True)
        except ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise


def _labels(reply: Any) -> tuple[list[tuple[str, bytes, bool, float]], list[str]]:
    """Labels in an XREADGROUP reply, and the ids of entries trimmed away since delivery."""
    out = []
    gone = []
    streams: Any = reply or []
    for _, entries in streams:
        for entry_id, fields in entries:
            if not fields:
                gone.append(_text(entry_id))
                continue
            digest = bytes(fields[b"d"])
            flag, labeled_at = text_fields(fields, ("f", "t"))
            out.append((_text(entry_id), digest, flag == "1", float(labeled_at)))
    return out, gone


async def read_label_queue(
    client: Client, consumer: str, count: int, block_ms: int, timeout_s: float
) -> list[tuple[str, bytes, bool, float]]:
    """This consumer's pending labels first (a restarted learner loses nothing), then new ones.

    Pending entries that were trimmed from the stream meanwhile have nothing left to apply:
    they are acknowledged and skipped.
    """
    while True:
        async with guard("a label-queue read", timeout_s):
            reply: Any = await client.xreadgroup(
                LABEL_GROUP, consumer, {LABEL_QUEUE_KEY: "0"}, count=count
            )
        pending, gone = _labels(reply)
        if gone:
            async with guard("acknowledging trimmed labels", timeout_s):
                await client.xack(LABEL_QUEUE_KEY, LABEL_GROUP, *gone)
        if pending:
            return pending
        if not gone:
            break
    async with guard("a label-queue read", timeout_s + block_ms / 1000):
        reply = await client.xreadgroup(
            LABEL_GROUP, consumer, {LABEL_QUEUE_KEY: ">"}, count=count, block=block_ms
        )
    return _labels(reply)[0]


async def read_shadow_log(client: Client, timeout_s: float) -> ScoreTable:
    """The whole shadow log as a `ScoreTable` (reasons are not kept: empty strings)."""
    rows: list[list[str]] = []
    pages = _pages(client, SHADOW_KEY, "a shadow-log read", timeout_s, SHADOW_PAGE)
    async with contextlib.aclosing(pages):
        async for entries in pages:
            rows += [text_fields(fields, ("e", "t", "r", "d", "c")) for _, fields in entries]
    return ScoreTable(
        [r[0] for r in rows],
        np.asarray([float(r[1]) for r in rows], dtype=np.float64),
        np.asarray([float(r[2]) for r in rows], dtype=np.float64),
        [r[3] for r in rows],
        [""] * len(rows),
        [r[4] or None for r in rows],
    )


def ids_text(ids: Sequence[str]) -> list[str]:
    """Stream ids as given, checked to look like ids (``ms-seq``) so a typo fails clearly."""
    for entry_id in ids:
        ms, dash, seq = entry_id.partition("-")
        if not (dash and ms.isdigit() and seq.isdigit()):
            raise ValueError(f"{entry_id!r} is not a stream entry id (expected 'ms-seq')")
    return list(ids)
