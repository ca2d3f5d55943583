"""The engine over the embedded store (`service.engine.Engine` + `MemoryStore` + `Learner`).

What is checked, and against what:

- idempotency on ``event_id``: a retry returns the first answer marked ``duplicate`` and counts
  nothing twice (every profile equals the one of a run without the retry);
- recording without scoring, unknown, repeated and changed labels, against the documented
  outcomes (`LabelOutcome`) and the statistics a run with only the final label leaves;
- labels anchored at the event's time and seen only once they arrive (DESIGN.md tenet 2), against
  the Beta-binomial posterior mean ``(a + k) / (a + b + n)`` with ``k`` and ``n`` computed by hand
  from the definition of half-life decay ``2**(-age / h)``;
- maturity learning driven by event time, skipping labelled events;
- `Engine.score_without_state`: the prior alone, on what the event itself shows;
- no raw identifier value anywhere in the store (DESIGN.md tenet 7);
- the store's lifetimes in event time: an identifier unseen for longer than ``ttl_s`` and a
  learning record older than the label horizon are gone, as they are in Redis, where both expire.

All data is invented.
"""

from __future__ import annotations

import copy
import dataclasses
import math
from collections.abc import Iterator
from typing import Any

import disposable_email_domains
import pytest

from scoring.config import ScoringConfig
from scoring.event import Event
from scoring.fusion import Assessment, Fusion, ModelSnapshot, model_features, sigmoid
from scoring.hashing import KeyHasher
from scoring.identifiers import normalise_event
from scoring.profile import Profile
from service.engine import AlreadyRecorded, Engine, InFlight, ScoreResult
from service.stores.base import CLAIM_TTL_S
from service.stores.memory import MemoryStore
from service.workers.learner import LabelOutcome, Learner

pytestmark = pytest.mark.anyio

SECRET = b"engine-test-secret"
T0 = 1_790_000_000.0
CFG = ScoringConfig(
    half_lives_s=(60.0, 600.0, 3600.0),
    label_half_life_s=600.0,
    fanout_windows_s=(600.0, 3600.0),
    ttl_half_lives=2.0,  # identifiers live 2 hours after their last event
    maturity_s=1800.0,
    negative_sample_rate=1.0,  # every unlabelled event matures (sampling is not under test)
    warmup_s=0.0,
)
RECORD_TTL_S = 4 * 3600.0
ANSWER_TTL_S = 3600.0


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


class Recording(Fusion):
    """A `Fusion` that keeps every feature vector it is asked to assess."""

    def __init__(self, config: ScoringConfig) -> None:
        super().__init__(config)
        self.seen: list[list[float]] = []

    def assess(self, x: Any, *, prior_only: bool = False) -> Assessment:
        self.seen.append(list(x))
        return super().assess(x, prior_only=prior_only)


@dataclasses.dataclass
class Rig:
    store: MemoryStore
    fusion: Recording
    learner: Learner
    engine: Engine

    def digest(self, kind: str, value: str) -> bytes:
        return self.engine.hasher.digest(kind, value)

    def profile(self, kind: str, value: str) -> Profile | None:
        return self.store.profiles.get((kind, self.digest(kind, value)))

    def feature(self, name: str, index: int = -1) -> float:
        return self.fusion.seen[index][self.fusion.layout.index(name)]


def rig(config: ScoringConfig = CFG, record_ttl_s: float = RECORD_TTL_S) -> Rig:
    store = MemoryStore(config, ANSWER_TTL_S, record_ttl_s)
    fusion = Recording(config)
    learner = Learner(store, config, fusion)
    return Rig(store, fusion, learner, Engine(store, config, KeyHasher(SECRET), fusion, learner))


def ev(n: int, t: float, **fields: Any) -> Event:
    """An invented login ``t`` seconds after T0, account and device set unless overridden."""
    values: dict[str, Any] = {"account_id": "acct-orchid-5531", "device_id": "dev-lantern-77"}
    values.update(fields)
    return Event(f"ev-{n}", T0 + t, values.pop("type", "login"), **values)


def stream() -> list[Event]:
    """Thirty events of three accounts sharing two devices and one network, with amounts."""
    out = []
    for n in range(30):
        out.append(
            ev(
                n,
                37.0 * n,
                type="checkout" if n % 3 == 0 else "login",
                account_id=f"acct-{n % 3}-orchid",
                device_id=f"dev-{n % 2}-lantern",
                ip=f"11.22.33.{40 + n % 4}",
                amount=10.0 + n if n % 3 == 0 else None,
            )
        )
    return out


# --- idempotency ---------------------------------------------------------------------------


async def test_retry_returns_the_first_answer_and_counts_nothing_twice() -> None:
    events = stream()
    plain, retried = rig(), rig()
    first: dict[str, ScoreResult] = {}
    for e in events:
        first[e.event_id] = await plain.engine.score(e)
    answers: list[ScoreResult] = []
    for i, e in enumerate(events):
        answers.append(await retried.engine.score(e))
        if i in (4, 11, 20):
            answers.append(await retried.engine.score(e))  # a retry right away
        if i == 15:
            answers.append(await retried.engine.score(events[3]))  # a late retry
    assert retried.store.profiles == plain.store.profiles  # nothing counted twice
    duplicates = [a for a in answers if a.duplicate]
    assert len(duplicates) == 4
    for a in answers:
        reference = first[a.event_id]
        assert a.risk == pytest.approx(reference.risk, abs=5e-7)  # answers keep 6 decimals
        assert (a.decision, a.reasons, a.reason_codes) == (
            reference.decision,
            reference.reasons,
            reference.reason_codes,
        )
        assert a.model_version == reference.model_version


async def test_retry_with_other_content_still_gets_the_first_answer() -> None:
    r = rig()
    disposable = sorted(disposable_email_domains.blocklist)[0]
    first = await r.engine.score(ev(1, 0.0))
    again = await r.engine.score(ev(1, 5.0, email=f"someone@{disposable}"))
    assert again.duplicate
    assert again.risk == pytest.approx(first.risk, abs=5e-7)
    assert again.reasons == first.reasons
    assert r.profile("email", f"someone@{disposable}") is None  # the retry recorded nothing


async def test_retry_after_the_idempotency_window_is_a_new_event() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    later = await r.engine.score(ev(1, ANSWER_TTL_S + 1.0))
    assert not later.duplicate
    profile = r.profile("account", "acct-orchid-5531")
    assert profile is not None
    assert profile.count(1, T0 + ANSWER_TTL_S + 1.0, CFG) == pytest.approx(
        1.0 + 2.0 ** (-(ANSWER_TTL_S + 1.0) / 600.0), abs=1e-12
    )


async def test_a_request_in_flight_blocks_its_twin_until_the_claim_expires() -> None:
    r = rig()
    plan = r.engine.planner.plan(ev(1, 0.0))
    await r.store.begin(plan, read=True)  # another request claimed the id, not yet answered
    with pytest.raises(InFlight, match="being scored by another request"):
        await r.engine.score(ev(1, 1.0))
    result = await r.engine.score(ev(1, CLAIM_TTL_S + 1.0))  # that request died: the claim lapses
    assert not result.duplicate


async def test_record_then_score_of_the_same_id_raises_already_recorded() -> None:
    r = rig()
    assert await r.engine.record(ev(1, 0.0)) is True
    with pytest.raises(AlreadyRecorded, match="recorded without scoring"):
        await r.engine.score(ev(1, 1.0))
    assert await r.engine.record(ev(1, 2.0)) is False  # recorded once only
    profile = r.profile("account", "acct-orchid-5531")
    assert profile is not None
    assert profile.count(2, T0, CFG) == pytest.approx(1.0, abs=1e-12)


async def test_score_then_record_of_the_same_id_records_nothing() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    assert await r.engine.record(ev(1, 1.0)) is False
    profile = r.profile("account", "acct-orchid-5531")
    assert profile is not None
    assert profile.count(2, T0, CFG) == pytest.approx(1.0, abs=1e-12)


# --- labels ----------------------------------------------------------------------------


async def test_label_for_an_unknown_event() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    before = copy.deepcopy(r.store.profiles)
    assert await r.engine.label("ev-never-seen", True) is LabelOutcome.UNKNOWN_EVENT
    assert r.store.profiles == before
    assert r.learner.model.positives == 0


async def test_label_after_the_label_horizon_is_unknown() -> None:
    """The learning record lives for the label horizon of event time: a label arriving later
    finds none (in Redis the record has expired; the batch replay counts it unknown too)."""
    r = rig(record_ttl_s=3600.0)
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, 3599.0, account_id="acct-other-2"))
    assert await r.engine.label("ev-1", False) is LabelOutcome.APPLIED  # within the horizon
    await r.engine.score(ev(3, 3600.0, account_id="acct-other-3"))  # the horizon has passed
    assert await r.engine.label("ev-1", True) is LabelOutcome.UNKNOWN_EVENT


async def test_maturity_skips_records_past_the_label_horizon() -> None:
    """Maturity reads the same records: one whose lifetime ended first is not learned."""
    r = rig(record_ttl_s=1000.0)  # shorter than maturity (1800 s)
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, 1500.0, account_id="acct-other-2"))  # ev-1's record has expired
    await r.engine.score(ev(3, 3000.0, account_id="acct-other-3"))  # ev-1 is due, ev-2 is not
    assert r.learner.model.negatives == 0


async def test_label_twice_is_a_duplicate_and_changes_nothing() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    assert await r.engine.label("ev-1", True) is LabelOutcome.APPLIED
    after_first = copy.deepcopy(r.store.profiles)
    version = r.fusion.snapshot.version
    assert await r.engine.label("ev-1", True) is LabelOutcome.DUPLICATE
    assert r.store.profiles == after_first
    assert r.learner.model.positives == 1  # learned once
    assert r.fusion.snapshot.version == version


async def test_label_on_a_recorded_event_updates_statistics_but_teaches_nothing() -> None:
    r = rig()
    await r.engine.record(ev(1, 0.0))
    assert await r.engine.label("ev-1", True) is LabelOutcome.APPLIED
    profile = r.profile("account", "acct-orchid-5531")
    assert profile is not None
    assert profile.bad
    assert r.learner.model.positives == 0  # no features were logged for it


LABEL_KINDS_EVENT = {
    "account_id": "acct-orchid-5531",
    "device_id": "dev-lantern-77",
    "ip": "11.22.33.44",
    "phone": "+44 20 7946 0321",
    "email": "ana.sample@quillpost.example",
}


def _keys(fields: dict[str, str]) -> list[tuple[str, str]]:
    return list(normalise_event(default_region=None, **fields).keys)


async def test_a_changed_label_reverts_the_earlier_one_everywhere() -> None:
    changed, legit_only = rig(), rig()
    for r in (changed, legit_only):
        await r.engine.score(ev(1, 0.0, **LABEL_KINDS_EVENT))
    assert await changed.engine.label("ev-1", True) is LabelOutcome.APPLIED
    assert await changed.engine.label("ev-1", False) is LabelOutcome.CHANGED
    assert await legit_only.engine.label("ev-1", False) is LabelOutcome.APPLIED
    h = CFG.label_half_life_s
    checked = 0
    for kind, value in _keys(LABEL_KINDS_EVENT):
        a, b = changed.profile(kind, value), legit_only.profile(kind, value)
        assert a is not None
        assert b is not None
        if kind not in CFG.label_kinds:
            assert not a.bad
            assert not a.good
            continue
        t = T0 + 500.0
        assert _read(a.bad, t, h) == pytest.approx(0.0, abs=1e-12), kind  # fraud reverted
        assert _read(a.good, t, h) == _read(b.good, t, h) > 0.0, kind
        assert a.counts == b.counts, kind
        checked += 1
    assert checked == len(CFG.label_kinds)  # the event carried every label kind


async def test_changing_back_and_forth() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    outcomes = [await r.engine.label("ev-1", f) for f in (True, False, True, True)]
    assert outcomes == [
        LabelOutcome.APPLIED,
        LabelOutcome.CHANGED,
        LabelOutcome.CHANGED,
        LabelOutcome.DUPLICATE,
    ]
    profile = r.profile("device", "dev-lantern-77")
    assert profile is not None
    assert _read(profile.bad, T0, 600.0) == pytest.approx(1.0, abs=1e-12)
    assert _read(profile.good, T0, 600.0) == pytest.approx(0.0, abs=1e-12)


def _read(sums: dict[int, float], t_s: float, half_life_s: float) -> float:
    from scoring.decay import decayed_value

    return decayed_value(sums, t_s, half_life_s)


def _excess(k: float, n: float, config: ScoringConfig = CFG) -> float:
    """Beta-binomial posterior mean (a + k) / (a + b + n) as log-odds over the base rate."""
    rate = (config.prior_alpha + k) / (config.prior_alpha + config.prior_beta + n)
    return math.log(rate / (1.0 - rate)) - config.base_logit


async def test_labels_are_anchored_at_the_event_and_seen_only_after_they_arrive() -> None:
    r = rig()
    h = CFG.label_half_life_s
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, 300.0))  # before the label arrives: no fraud known
    assert r.feature("account.bad") == pytest.approx(_excess(0.0, 1.0 * 2 ** (-300 / h)))
    assert await r.engine.label("ev-1", True) is LabelOutcome.APPLIED  # arrives now
    await r.engine.score(ev(3, 900.0))
    n = 2 ** (-900 / h) + 2 ** (-600 / h)
    k = 2 ** (-900 / h)  # anchored at ev-1's time, not when the label arrived (after t = 300)
    assert r.feature("account.bad") == pytest.approx(_excess(k, n), abs=1e-12)
    assert r.feature("account.bad") != pytest.approx(_excess(2 ** (-600 / h), n), abs=1e-6)
    assert r.fusion.seen[1][r.fusion.layout.index("account.bad")] < 0  # the earlier read stays


async def test_labels_reach_only_the_identifiers_of_their_event() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, 10.0, account_id="acct-bystander-9", device_id="dev-other-3"))
    await r.engine.label("ev-1", True)
    bystander = r.profile("account", "acct-bystander-9")
    assert bystander is not None
    assert not bystander.bad


# --- maturity ------------------------------------------------------------------------------


async def test_maturity_learning_waits_for_event_time() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, CFG.maturity_s - 1.0, account_id="acct-other-2"))
    assert r.learner.model.negatives == 0  # ev-1 is not mature yet
    assert r.fusion.snapshot.version == 0
    await r.engine.score(ev(3, CFG.maturity_s, account_id="acct-other-3"))
    assert r.learner.model.negatives == 1  # ev-1 matured exactly now, and was learned
    assert r.fusion.snapshot.version == 1  # and published to the engine's fusion
    assert r.fusion.snapshot.negatives == 1


@pytest.mark.parametrize("is_fraud", [True, False])
async def test_maturity_skips_labelled_events(is_fraud: bool) -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    await r.engine.label("ev-1", is_fraud)
    await r.engine.score(ev(2, 2 * CFG.maturity_s, account_id="acct-other-2"))
    model = r.learner.model
    assert (model.positives, model.negatives) == ((1, 0) if is_fraud else (0, 1))


async def test_maturity_never_learns_recorded_events() -> None:
    r = rig()
    await r.engine.record(ev(1, 0.0))
    await r.engine.score(ev(2, 2 * CFG.maturity_s, account_id="acct-other-2"))
    assert r.learner.model.negatives == 0


# --- without state ------------------------------------------------------------------------


def learned_snapshot(fusion: Fusion) -> ModelSnapshot:
    inputs = model_features(fusion.layout)
    return ModelSnapshot(
        3,
        inputs,
        (10.0,) * len(inputs),
        (0.0,) * len(inputs),
        (1.0,) * len(inputs),
        (0.7,) * len(inputs),
        2.0,
        positives=10_000,
        negatives=100_000,
    )


async def test_score_without_state_uses_the_prior_only() -> None:
    r = rig()
    for e in stream():
        await r.engine.score(e)  # history the state-less answer must not see
    r.fusion.use(learned_snapshot(r.fusion))  # a model that would change the risk a lot
    disposable = sorted(disposable_email_domains.blocklist)[0]
    event = ev(99, 2000.0, account_id="acct-0-orchid", email=f"someone@{disposable}")
    before = copy.deepcopy((r.store.profiles, r.store.answers, r.store.records))
    result = r.engine.score_without_state(event)
    assert result.state_available is False
    assert not result.duplicate
    assert result.risk == sigmoid(CFG.base_logit + 2.0)  # the disposable domain's points alone
    assert result.reason_codes == ("email.disposable",)
    assert r.feature("account.new") == 1.0  # the account's history was not read
    assert (r.store.profiles, r.store.answers, r.store.records) == before  # nothing recorded
    stateful = await r.engine.score(event)
    assert stateful.risk != pytest.approx(result.risk)


# --- privacy ----------------------------------------------------------------------------

RAW = {
    "account_id": "acct-Orchid-5531-private",
    "device_id": "dev-Lantern-77-private",
    "ip": "11.22.33.44",
    "phone": "+44 20 7946 0321",
    "email": "Ana.Private@QuillPost.example",
}


def _strings(obj: Any, seen: set[int] | None = None) -> Iterator[str | bytes]:
    """Every str and bytes reachable from an object (dicts, sequences, slots, attributes)."""
    seen = set() if seen is None else seen
    if id(obj) in seen:
        return
    seen.add(id(obj))
    if isinstance(obj, str | bytes):
        yield obj
    elif isinstance(obj, dict):
        for k, v in obj.items():
            yield from _strings(k, seen)
            yield from _strings(v, seen)
    elif isinstance(obj, list | tuple | set | frozenset):
        for item in obj:
            yield from _strings(item, seen)
    elif hasattr(obj, "__slots__") or hasattr(obj, "__dict__"):
        names = list(getattr(obj, "__slots__", ())) + list(getattr(obj, "__dict__", {}))
        for name in names:
            yield from _strings(getattr(obj, name, None), seen)


async def test_the_store_never_holds_a_raw_identifier() -> None:
    r = rig()
    for n in range(12):
        fields = {**RAW, "account_id": f"{RAW['account_id']}-{n % 3}"}
        await r.engine.score(ev(n, 200.0 * n, type="checkout", amount=25.0, **fields))
    await r.engine.record(ev(50, 2500.0, **RAW))
    await r.engine.label("ev-1", True)
    await r.engine.label("ev-2", False)
    await r.engine.score(ev(60, 2 * CFG.maturity_s, **RAW))  # maturity: a snapshot is published
    assert r.store.snapshot is not None
    secrets = set(RAW.values()) | {f"{RAW['account_id']}-{n}" for n in range(3)}
    secrets |= {value for _, value in _keys(RAW)}  # canonical forms (lower-cased e-mail, E.164...)
    assert {"ana.private@quillpost.example", "+442079460321", "11.22.33.0/24"} <= secrets
    held = list(_strings(r.store))
    assert len(held) > 30  # the walk did reach the records, answers and profiles
    for secret in secrets:
        for item in held:
            if isinstance(item, bytes):
                assert secret.encode() not in item, secret
            else:
                assert secret not in item, secret


# --- lifetimes in event time -------------------------------------------------------------


async def test_recording_after_the_lifetime_starts_a_new_record() -> None:
    """Regression: `record` (no scoring) added to an identifier's expired record, so its first
    seen stayed at the old time and old counts came back; in Redis the key has expired by then.
    Now recording forgets an expired record as scoring does."""
    r = rig()
    await r.engine.score(ev(1, 0.0))
    later = CFG.ttl_s + 100.0
    await r.engine.record(ev(2, later))
    await r.engine.score(ev(3, later + 60.0))
    assert r.feature("account.age_d") == pytest.approx(math.log1p(60.0 / 86_400.0), abs=1e-12)
    assert r.feature("account.n_1h") == pytest.approx(math.log1p(2 ** (-60.0 / 3600.0)), abs=1e-12)


async def test_scoring_after_the_lifetime_starts_a_new_record() -> None:
    r = rig()
    await r.engine.score(ev(1, 0.0))
    await r.engine.score(ev(2, CFG.ttl_s))  # exactly the lifetime: still the same record
    assert r.feature("account.new") == 0.0
    await r.engine.score(ev(3, 2 * CFG.ttl_s + 1.0))  # more than the lifetime after ev-2
    assert r.feature("account.new") == 1.0
