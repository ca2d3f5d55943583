"""The learner process on a real redis-server: restart safety, graceful stop, refusals.

A learner that dies after applying a batch but before acknowledging it gets the batch back on
restart (Redis Streams consumer groups redeliver unacknowledged entries to the same consumer:
XREADGROUP with id 0, Redis documentation of XREADGROUP); each label must still count once.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest
import redis
from test_service_redis_support import (
    SECRET,
    T0,
    FaultyStore,
    event,
    flush,
    redis_settings,
    running,
    runtime_of,
    unavailable,
)

from scoring.config import DAY_S, ScoringConfig
from service.cli import main
from service.stores.base import StoreUnavailable
from service.stores.redis import RedisStore
from service.stores.redis_keys import LABEL_QUEUE_KEY
from service.workers.learn_loop import learn

pytestmark = [pytest.mark.redis, pytest.mark.anyio]
ROOT = Path(__file__).parents[2]
HALF_LIFE_S = ScoringConfig().label_half_life_s


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _label(n: int, is_fraud: bool) -> dict[str, object]:
    return {"event_id": f"ev-{n}", "labeled_at": T0 + DAY_S, "is_fraud": is_fraud}


def _decayed(stats: dict[str, Any], event_numbers: list[int]) -> float:
    """Fraud labels of those events read at ``as_of``: sum of 2 ** (-(t - t_i) / h)."""
    as_of = datetime.fromisoformat(stats["as_of"].replace("Z", "+00:00")).timestamp()
    return math.fsum(2.0 ** (-(as_of - (T0 + n)) / HALF_LIFE_S) for n in event_numbers)


async def test_a_restarted_learner_loses_nothing_and_counts_each_label_once(
    redis_url: str,
) -> None:
    config = redis_settings(redis_url)
    async with running(config) as (client, app):
        for n in range(4):
            await client.post("/v1/score", json=event(n))
        await client.post("/v1/labels", json={"labels": [_label(0, True), _label(1, False)]})
        await flush(app)

        store = await RedisStore.connect(config, config.scoring_config())
        with pytest.raises(StoreUnavailable):  # dies after applying, before acknowledging
            await learn(config, once=True, store=FaultyStore(store, {"ack_labels": unavailable}))
        crashed = (await client.get("/v1/reputation/device/dev-shared")).json()
        published = await runtime_of(app).store.snapshot_version()

        await client.post("/v1/labels", json={"labels": [_label(2, True)]})
        second = await learn(config, once=True)
        third = await learn(config, once=True)
        after = (await client.get("/v1/reputation/device/dev-shared")).json()
    assert crashed["labels"]["fraud"] == pytest.approx(
        _decayed(crashed, [0]), abs=2e-6
    )  # rounded to 6 decimals
    assert second.outcomes == {"duplicate": 2, "applied": 1}
    assert after["labels"]["fraud"] == pytest.approx(
        _decayed(after, [0, 2]), abs=2e-6
    )  # rounded to 6 decimals
    assert after["labels"]["legitimate"] == pytest.approx(
        _decayed(after, [1]), abs=2e-6
    )  # rounded to 6 decimals
    assert third.labels == 0
    assert published == 1  # the batch was published before the crash
    assert second.model_version > published  # went on from that snapshot's version


def _queue_length(url: str) -> int:
    with redis.Redis.from_url(url) as c:
        return int(c.xlen(LABEL_QUEUE_KEY))


async def test_learn_stops_cleanly_on_sigterm(redis_url: str) -> None:
    config = redis_settings(redis_url)
    async with running(config) as (client, app):
        await client.post("/v1/score", json=event(1))
        await client.post("/v1/labels", json={"labels": [_label(1, True)]})
        await flush(app)
    env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
    env.update({"EMBERSCORE_REDIS_URL": redis_url, "EMBERSCORE_HASH_SECRET": SECRET})
    process = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "learn"],
        cwd=ROOT,
        env=env,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        for _ in range(200):  # the queued label is applied and acknowledged: the loop is running
            if _queue_length(redis_url) == 0:
                break
            time.sleep(0.05)
        assert _queue_length(redis_url) == 0
    finally:
        process.send_signal(signal.SIGTERM)
        _, err = process.communicate(timeout=20)
    assert process.returncode == 0
    assert "emberscore learn: 1 labels in 1 batches (1 applied)" in err
    assert "Traceback" not in err


def test_learn_refuses_without_redis_or_with_the_trial_secret_in_production(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    for name in [n for n in os.environ if n.startswith("EMBERSCORE_")]:
        monkeypatch.delenv(name)
    assert main(["learn", "--once"]) == 2
    assert "learn needs EMBERSCORE_REDIS_URL" in capsys.readouterr().err
    monkeypatch.setenv("EMBERSCORE_REDIS_URL", "redis://127.0.0.1:9/0")
    monkeypatch.setenv("EMBERSCORE_MODE", "production")
    assert main(["learn", "--once"]) == 2
    assert "set EMBERSCORE_HASH_SECRET" in capsys.readouterr().err
