"""``GET`` / ``DELETE /v1/reputation/{kind}/{value}``: statistics of one identifier, and erasure.

Event times are in 2090, after the wall clock, so statistics are read at the last event's time
and every expected number is exact. Each number is checked against its published definition:

- decayed count: ``sum_i 2 ** (-(t - t_i) / h)`` (Cormode, Shkapenyuk, Srivastava, Xu, "Forward
  Decay", ICDE 2009, the exponential decay function they rewrite);
- fan-out: linear counting ``-m ln(1 - V / m)`` with ``V`` occupied of ``m`` buckets, standard
  error ``sqrt(m (e^r - r - 1)) / n`` at load ``r = n / m`` (Whang, Vander-Zanden, Taylor, ACM
  TODS 15(2), 1990);
- bad rate: the Beta-binomial posterior mean ``(a + k) / (a + b + n)`` (Gelman et al., Bayesian
  Data Analysis, 3rd ed., chapter 2; chapter from memory).
"""

from __future__ import annotations

import math
from urllib.parse import quote

import pytest
from test_api_support import SECRET, T0, event, running

from scoring.config import DAY_S, ScoringConfig
from scoring.hashing import KeyHasher

pytestmark = pytest.mark.anyio

CFG = ScoringConfig()
HASHER = KeyHasher(SECRET.encode())
TIMES = [T0, T0 + 1800.0, T0 + 3600.0]


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def _events() -> list[dict[str, object]]:
    return [
        event(
            0,
            ts=t,
            event_id=f"ev-{i}",
            account_id=f"acct-{i}",
            email=f"shopper{i}@quillpost.example",
        )
        for i, t in enumerate(TIMES)
    ]


def _url(kind: str, raw: str) -> str:
    return f"/v1/reputation/{kind}/{quote(raw, safe='')}"


async def _scored(client: object) -> None:
    for body in _events():
        reply = await client.post("/v1/score", json=body)  # type: ignore[attr-defined]
        assert reply.status_code == 200


async def test_device_statistics_match_their_definitions() -> None:
    async with running() as (client, _):
        await _scored(client)
        stats = (await client.get(_url("device", "dev-alpha"))).json()
    t = TIMES[-1]
    assert stats["kind"] == "device"
    assert stats["key"] == HASHER.digest("device", "dev-alpha").hex()
    assert stats["as_of"] == stats["last_seen"] == "2090-01-01T01:00:00Z"
    assert stats["first_seen"] == "2090-01-01T00:00:00Z"
    assert stats["age_days"] == round(1 / 24, 6)
    for label, h in (("1h", 3600.0), ("1d", DAY_S), ("30d", 30 * DAY_S)):
        expected = math.fsum(2.0 ** (-(t - ti) / h) for ti in TIMES)
        assert stats["events"][label] == pytest.approx(expected, abs=1e-6)
    m = CFG.fanout_buckets
    buckets = {
        int.from_bytes(HASHER.digest("account", f"acct-{i}")[4:8], "big") % m for i in range(3)
    }
    n = -m * math.log(1 - len(buckets) / m)
    r = n / m
    for window in ("1d", "30d"):
        assert stats["fanout"]["account"][window] == pytest.approx(n, abs=1e-3)
        error = math.sqrt(m * (math.exp(r) - r - 1)) / n
        assert stats["fanout"]["account"][f"{window}_relative_error"] == pytest.approx(
            error, abs=1e-3
        )
    assert stats["labels"]["fraud"] == 0.0
    n30 = math.fsum(2.0 ** (-(t - ti) / CFG.label_half_life_s) for ti in TIMES)
    no_labels = CFG.prior_alpha / (CFG.prior_alpha + CFG.prior_beta + n30)
    assert stats["labels"]["bad_rate"] == pytest.approx(no_labels, abs=1e-6)


async def test_bad_rate_after_a_fraud_label() -> None:
    async with running() as (client, _):
        await _scored(client)
        labels = [{"event_id": "ev-0", "labeled_at": T0 + 7200, "is_fraud": True}]
        assert (await client.post("/v1/labels", json={"labels": labels})).status_code == 200
        stats = (await client.get(_url("device", "dev-alpha"))).json()
    t, h = TIMES[-1], CFG.label_half_life_s
    k = 2.0 ** (-(t - TIMES[0]) / h)  # the label is anchored at its event's time
    n = math.fsum(2.0 ** (-(t - ti) / h) for ti in TIMES)
    a, b = CFG.prior_alpha, CFG.prior_beta
    assert stats["labels"]["fraud"] == pytest.approx(k, abs=1e-6)
    assert stats["labels"]["legitimate"] == 0.0
    assert stats["labels"]["bad_rate"] == pytest.approx((a + k) / (a + b + n), abs=1e-6)


# (kind, raw forms that must reach the same key, canonical value)
FORMS = [
    ("account", ["acct-0", "  acct-0 "], "acct-0"),
    (
        "email",
        ["shopper0@quillpost.example", " SHOPPER0@QuillPost.Example "],
        "shopper0@quillpost.example",
    ),
    ("email_domain", ["quillpost.example", "Other@QUILLPOST.example"], "quillpost.example"),
    ("ip", ["11.22.33.44", "11.22.33.44:8443", "::ffff:11.22.33.44"], "11.22.33.44"),
    ("ip_net", ["11.22.33.0/24", "11.22.33.200"], "11.22.33.0/24"),
    ("phone", ["+44 20 7946 0321", "0044 (0)20 7946 0321"], "+442079460321"),
    ("phone_prefix", ["+44 20 7946 0999"], "+4420"),
]


@pytest.mark.parametrize(("kind", "raws", "canonical"), FORMS, ids=[f[0] for f in FORMS])
async def test_raw_forms_reach_the_same_key(kind: str, raws: list[str], canonical: str) -> None:
    async with running() as (client, _):
        await _scored(client)
        replies = [await client.get(_url(kind, raw)) for raw in raws]
    for raw, reply in zip(raws, replies, strict=True):
        assert reply.status_code == 200, raw
        assert reply.json()["key"] == HASHER.digest(kind, canonical).hex()
        assert raw.strip() not in reply.text  # the raw value is not echoed


async def test_unknown_and_unusable_values() -> None:
    async with running() as (client, _):
        await _scored(client)
        unseen = await client.get(_url("device", "dev-never"))
        kind = await client.get(_url("shoe_size", "42"))
        garbage = await client.get(_url("ip", "not-an-address"))
        other_net = await client.get(_url("ip_net", "11.22.0.0/16"))
    assert unseen.status_code == 404
    assert unseen.json() == {
        "detail": "no statistics for this device: never seen, expired or erased"
    }
    assert kind.status_code == 422
    assert kind.json()["detail"][0]["field"] == "kind"
    assert garbage.json()["detail"] == [
        {"field": "value", "reason": "the value gives no ip key (ip_invalid)"}
    ]
    assert other_net.status_code == 422


async def test_erasure_removes_one_identifier_only() -> None:
    async with running() as (client, _):
        await _scored(client)
        erased = await client.delete(_url("email", "shopper1@quillpost.example"))
        gone = await client.get(_url("email", "shopper1@quillpost.example"))
        again = await client.delete(_url("email", "shopper1@quillpost.example"))
        kept = await client.get(_url("email", "shopper0@quillpost.example"))
        domain = await client.get(_url("email_domain", "quillpost.example"))
    assert erased.status_code == 204
    assert erased.content == b""
    assert gone.status_code == 404
    assert again.status_code == 404
    assert kept.status_code == 200
    assert domain.status_code == 200
