"""Print how much Redis memory the store uses per identifier and per event.

Usage: ``.venv/bin/python loadtest/redis_memory.py [--events N] [--seed S] [--log-shards K]``

Starts its own ``redis-server`` on a free loopback port (never touching another one), replays
the invented demo stream (`generate(ScenarioParams())`, 120,000 events by default) through the
Redis store with an in-process learner, then measures:

- ``used_memory`` (INFO memory) of the empty server and after the replay;
- per class of key, the drop in ``used_memory`` when that class is deleted (so dictionary
  entries, expiry entries and allocator rounding count), and ``MEMORY USAGE`` on a sample;
- bytes per live identifier, per event for the idempotency keys and the learning records, per
  label and per maturity-queue entry, and the sizing formula an operator can use.

The replay runs in seconds of wall clock, so nothing expires during it: every answer and every
record is alive at the end, which is what "while they live" needs. Log shards default to the
sizing rule (events alive / 1000).
"""

from __future__ import annotations

import argparse
import asyncio
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import redis

from scoring.fusion import Fusion
from scoring.hashing import KeyHasher
from service.config import Settings
from service.engine import Engine
from service.replay import replay
from service.scenario import ScenarioParams, generate
from service.stores.redis import RedisStore
from service.workers.learner import Learner

IDENTIFIER = re.compile(r"es\{[a-z][A-Za-z0-9_-]{11}\}")
CLASSES = ("answer", "record", "maturity", "label", "identifier")
SAMPLE = 2_000


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start_server(directory: Path) -> tuple[subprocess.Popen[bytes], int]:
    """A redis-server of our own (no persistence), answering PING."""
    binary = shutil.which("redis-server")
    if binary is None:
        sys.exit(
            "redis-server not found on PATH: install it (Debian: apt-get install redis-server)"
        )
    port = free_port()
    args = [binary, "--port", str(port), "--bind", "127.0.0.1", "--save", "", "--appendonly",
            "no", "--dir", str(directory), "--logfile", str(directory / "redis.log")]  # fmt: skip
    process = subprocess.Popen(args, stdout=subprocess.DEVNULL)
    deadline = time.monotonic() + 20
    while True:
        try:
            with redis.Redis(port=port) as c:
                c.ping()
            return process, port
        except redis.ConnectionError:
            if time.monotonic() > deadline or process.poll() is not None:
                process.terminate()
                sys.exit(f"redis-server did not start; see {directory / 'redis.log'}")
            time.sleep(0.05)


def classify(key: bytes) -> str:
    name = key.decode()
    if IDENTIFIER.fullmatch(name):
        return "identifier"
    for prefix, cls in (("i{", "answer"), ("lb{", "label"), ("l{", "record")):
        if name.startswith(prefix):
            return cls
    return "maturity" if name == "m{mature}" else "other"


def used_memory(c: redis.Redis) -> int:
    time.sleep(1.0)  # let the server's cron resize its hash tables after deletions
    return int(c.info("memory")["used_memory"])


async def run_replay(settings: Settings, params: ScenarioParams) -> tuple[int, int]:
    scenario = generate(params)
    config = settings.scoring_config()
    store = await RedisStore.connect(settings, config)
    fusion = Fusion(config)
    engine = Engine(
        store, config, KeyHasher(b"memory-script-secret"), fusion, Learner(store, config, fusion)
    )
    started = time.perf_counter()

    def progress(done: int) -> None:
        if done % 16_384 < 4096:
            print(f"  {done:,} events", file=sys.stderr)

    try:
        _, stats = await replay(engine, scenario.events, scenario.labels, progress)
        await store.flush()
    finally:
        await store.close()
    elapsed = time.perf_counter() - started
    print(f"replayed {stats.events:,} events, {stats.labels_applied:,} labels in {elapsed:.0f} s")
    return stats.events, stats.labels_applied


def slot_bytes(c: redis.Redis) -> tuple[int, int, int, int]:
    """Bytes of the bucket arrays of the key and of the expiry hash table; keys; keys with a TTL.

    MEMORY STATS counts per key a table entry and an object header (24 + 16 bytes) in the main
    table's overhead, a 24-byte entry in the expiry table's, and 8 bytes per bucket in both.
    """
    db: Any = c.memory_stats().get("db.0") or {}
    keys = int(c.dbsize())
    expiring = int(c.info("keyspace").get("db0", {}).get("expires", 0))
    main = int(db.get("overhead.hashtable.main", 0)) - 40 * keys
    expires = int(db.get("overhead.hashtable.expires", 0)) - 24 * expiring
    return main, expires, keys, expiring


def measure(c: redis.Redis) -> tuple[dict[str, dict[str, float]], float]:
    """Per class: key count, entries (streams), bytes freed by deleting it, sample usage.

    Bucket arrays shrink only when a table empties below a tenth, so whichever class is deleted
    last would be charged for all of them: "dropped" leaves them out, and the share of one key
    with a TTL (returned) is added back when the figures per key are worked out.
    """
    keys: dict[str, list[bytes]] = {cls: [] for cls in (*CLASSES, "other")}
    for key in c.scan_iter(count=5_000):
        keys[classify(key)].append(key)
    main, expires, n_keys, n_expiring = slot_bytes(c)
    share = main / max(1, n_keys) + expires / max(1, n_expiring)  # a key with a TTL is in both
    out: dict[str, dict[str, float]] = {}
    for cls in CLASSES:
        members = keys[cls]
        usage = [int(c.memory_usage(k, samples=0) or 0) for k in members[:SAMPLE]]
        entries = sum(int(c.xlen(k)) for k in members) if cls in ("record", "maturity") else 0
        before, slots_before = used_memory(c), sum(slot_bytes(c)[:2])
        for start in range(0, len(members), 1_000):
            c.delete(*members[start : start + 1_000])
        after, slots_after = used_memory(c), sum(slot_bytes(c)[:2])
        out[cls] = {
            "keys": len(members),
            "entries": entries,
            "dropped": (before - after) - (slots_before - slots_after),
            "sample_avg": sum(usage) / len(usage) if usage else 0.0,
        }
    return out, share


def report(
    m: dict[str, dict[str, float]], share: float, events: int, labels: int, base: int, rest: int
) -> None:
    ident, answer, record = m["identifier"], m["answer"], m["record"]
    b_id = ident["dropped"] / max(1, ident["keys"]) + share
    b_idem = answer["dropped"] / max(1, events) + share
    b_rec = record["dropped"] / max(1, events)
    b_lab = m["label"]["dropped"] / max(1, labels) + share
    b_mat = m["maturity"]["dropped"] / max(1, m["maturity"]["entries"])
    print(f"\nempty server used_memory: {base:,} bytes; left after deleting all: {rest:,} bytes")
    print(f"hash-table buckets per key with a TTL (key and expiry tables): {share:.1f} bytes")
    print(f"{'class':<12}{'keys':>10}{'entries':>10}{'freed bytes':>16}{'MEMORY USAGE avg':>19}")
    for cls, row in m.items():
        print(f"{cls:<12}{row['keys']:>10,.0f}{row['entries']:>10,.0f}{row['dropped']:>16,.0f}"
              f"{row['sample_avg']:>19,.1f}")  # fmt: skip
    print(f"\nlive identifier keys: {ident['keys']:,.0f}")
    print(f"B_id   bytes per live identifier:                 {b_id:8.1f}  (target <= 300)")
    print(f"B_idem bytes per event, idempotency key:          {b_idem:8.1f}  (target <= 150)")
    print(f"B_rec  bytes per event, learning record:          {b_rec:8.1f}  (target <= 150)")
    print(f"B_mat  bytes per maturity-queue entry:            {b_mat:8.1f}")
    print(f"B_lab  bytes per label:                           {b_lab:8.1f}")
    print(f"fixed  (empty server + model, meta; bytes):       {rest:8,d}")
    print(
        "\nmemory (bytes) ~= identifiers x B_id"
        " + event_rate x (idempotency_ttl_s x B_idem + label_horizon_s x B_rec)"
        " + event_rate x negative_sample_rate x maturity_s x B_mat"
        " + label_rate x label_horizon_s x B_lab + fixed"
    )
    print(
        f"             ~= identifiers x {b_id:.0f} + event_rate x (idempotency_ttl_s x {b_idem:.0f}"
        f" + label_horizon_s x {b_rec:.0f}) + event_rate x negative_sample_rate x maturity_s x"
        f" {b_mat:.0f} + label_rate x label_horizon_s x {b_lab:.0f} + {rest:,}"
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--events", type=int, default=ScenarioParams().n_events)
    parser.add_argument("--seed", type=int, default=ScenarioParams().seed)
    parser.add_argument("--log-shards", type=int, default=None, help="default: events / 1000")
    args = parser.parse_args()
    shards = args.log_shards or max(1, round(args.events / 1000))
    with tempfile.TemporaryDirectory() as tmp:
        process, port = start_server(Path(tmp))
        try:
            with redis.Redis(port=port) as c:
                base = used_memory(c)
                settings = Settings(
                    redis_url=f"redis://127.0.0.1:{port}/0", score_budget_ms=5000.0,
                    log_shards=shards,
                )  # fmt: skip
                params = ScenarioParams(n_events=args.events, seed=args.seed)
                print(f"redis-server on port {port}; {shards} log shards", file=sys.stderr)
                events, labels = asyncio.run(run_replay(settings, params))
                print(f"used_memory after the replay: {used_memory(c):,} bytes")
                measured, share = measure(c)
                report(measured, share, events, labels, base, used_memory(c))
        finally:
            process.terminate()
            process.wait(timeout=10)
    return 0


if __name__ == "__main__":
    sys.exit(main())
