"""The demo scenario generator: determinism, proportions, labels, identifiers and the rules.

Identifier checks use reference sources: the IANA special-purpose registries (table in
tests/data/scenario_special_purpose.csv, one source per row), Python's `ipaddress`, the
`phonenumbers` library (a port of libphonenumber) and the Public Suffix List as packaged by
`publicsuffixlist`. The rules in force are recomputed by brute force, independently of the
one-pass implementation.
"""

from __future__ import annotations

import csv
import ipaddress
import math
import re
from collections import Counter
from collections.abc import Callable
from pathlib import Path

import numpy as np
import phonenumbers
import pytest
from disposable_email_domains import blocklist
from publicsuffixlist import PublicSuffixList

from service.scenario import (
    RuleSet,
    Scenario,
    ScenarioError,
    ScenarioParams,
    generate,
    rule_hits,
    rules_in_force,
)
from service.scenario_events import ATTACK_SHAPES, SEGMENTS
from service.scenario_rules import RuleInputError
from service.tables import EventTable

DATA = Path(__file__).resolve().parents[1] / "data"
DAY_S = 86_400.0


@pytest.fixture(scope="module")
def scenario() -> Scenario:
    return generate(ScenarioParams(n_events=20_000, seed=11))


@pytest.fixture(scope="module")
def small() -> Scenario:
    """A small stream with much fraud, so that every rule has something to fire on."""
    return generate(ScenarioParams(n_events=2_500, seed=4, fraud_share=0.25))


def _columns(s: Scenario) -> dict[str, object]:
    e = s.events
    return {
        "event_id": e.event_id, "ts": e.ts_s.tolist(), "type": e.type,
        "account_id": e.account_id, "ip": e.ip, "device_id": e.device_id, "phone": e.phone,
        "email": e.email, "amount": np.nan_to_num(e.amount, nan=-1.0).tolist(),
        "decision": e.current_decision, "segment": s.segment, "fraud": s.is_fraud.tolist(),
        "labels": (s.labels.event_id, s.labels.labeled_at_s.tolist(), s.labels.is_fraud.tolist()),
    }  # fmt: skip


# --- determinism and shape ---------------------------------------------------------------


def test_same_seed_gives_identical_output() -> None:
    a = generate(ScenarioParams(n_events=4_000, seed=5))
    b = generate(ScenarioParams(n_events=4_000, seed=5))
    assert _columns(a) == _columns(b)


def test_different_seed_gives_different_output() -> None:
    a = generate(ScenarioParams(n_events=4_000, seed=5))
    b = generate(ScenarioParams(n_events=4_000, seed=6))
    assert a.events.event_id != b.events.event_id
    assert set(a.events.ip) != set(b.events.ip)
    assert set(a.events.email) != set(b.events.email)


def test_size_and_fraud_share(scenario: Scenario) -> None:
    assert abs(len(scenario.events) - 20_000) < 0.1 * 20_000
    assert 0.02 <= scenario.is_fraud.mean() <= 0.04
    lengths = {len(c) for c in (scenario.segment, scenario.is_fraud, scenario.events.type)}
    assert lengths == {len(scenario.events)}


def test_attack_shapes_in_stated_proportions(scenario: Scenario) -> None:
    mix = scenario.params.attack_mix
    fraud = Counter(s for s, f in zip(scenario.segment, scenario.is_fraud, strict=True) if f)
    total = sum(fraud.values())
    for shape in ATTACK_SHAPES:
        share = fraud[f"attack:{shape}"] / total
        assert abs(share - mix[shape] / sum(mix.values())) < 0.07, (shape, share)


def test_every_segment_present_and_truth_matches_segment(scenario: Scenario) -> None:
    assert set(scenario.segment) == set(SEGMENTS)
    for seg, fraud in zip(scenario.segment, scenario.is_fraud, strict=True):
        assert fraud == seg.startswith("attack:")


def test_attack_mix_can_select_one_shape() -> None:
    s = generate(ScenarioParams(n_events=4_000, seed=2, attack_mix={"takeover": 1.0}))
    assert {seg for seg in s.segment if seg.startswith("attack:")} == {"attack:takeover"}


def test_timestamps_sorted_whole_ms_inside_window(scenario: Scenario) -> None:
    p, ts = scenario.params, scenario.events.ts_s
    assert np.all(np.diff(ts) >= 0)
    assert ts.min() >= p.start_s
    assert ts.max() < p.start_s + p.days * DAY_S
    ms = ts * 1000.0
    assert np.all(np.abs(ms - np.round(ms)) < 1e-3)


def test_daily_and_weekly_rhythm(scenario: Scenario) -> None:
    """Night hours (UK time) are quieter than evenings, weekends busier than weekdays. Half the
    customers are in the UK; the others' evenings fall elsewhere on the UK clock."""
    rel = scenario.events.ts_s - scenario.params.start_s
    uk_hour = ((rel // 3600) + 1) % 24
    assert np.sum(uk_hour == 20) > 2 * np.sum(uk_hour == 4)
    weekday = (rel // DAY_S) % 7  # the default start is a Monday
    assert np.mean(np.isin(weekday, [5, 6])) > 2 / 7


def test_event_fields_follow_type(scenario: Scenario) -> None:
    e = scenario.events
    assert set(e.type) == {"signup", "login", "checkout"}
    for i, kind in enumerate(e.type):
        assert e.account_id[i] is not None
        assert e.ip[i] is not None
        assert (e.email[i] is None) == (kind == "login")
        assert math.isnan(e.amount[i]) == (kind != "checkout")
    amounts = e.amount[~np.isnan(e.amount)]
    assert amounts.min() > 0
    assert np.all(np.round(amounts, 2) == amounts)


def test_accounts_sign_up_once_before_anything_else(scenario: Scenario) -> None:
    e = scenario.events
    first_seen: dict[str | None, int] = {}
    signup_at: dict[str | None, int] = {}
    for i, (kind, acc) in enumerate(zip(e.type, e.account_id, strict=True)):
        first_seen.setdefault(acc, i)
        if kind == "signup":
            assert acc not in signup_at, "two sign-ups for one account"
            signup_at[acc] = i
    assert all(first_seen[a] == i for a, i in signup_at.items())


def test_takeovers_hit_established_accounts_keeping_their_contact(scenario: Scenario) -> None:
    e = scenario.events
    history: dict[str | None, int] = {}
    for i, acc in enumerate(e.account_id):
        seg = scenario.segment[i]
        if seg == "attack:takeover":
            assert history.get(acc, 0) >= 2, "victim without history in the stream"
        elif not seg.startswith("attack:"):
            history[acc] = history.get(acc, 0) + 1
    contact: dict[str | None, set[tuple[object, object]]] = {}
    for i, acc in enumerate(e.account_id):
        if e.email[i] is not None:
            contact.setdefault(acc, set()).add((e.email[i], e.phone[i]))
    assert all(len(v) == 1 for v in contact.values())


def test_benign_hard_cases_look_as_described(scenario: Scenario) -> None:
    e, seg = scenario.events, np.array(scenario.segment)
    campus = Counter(ip for ip, s in zip(e.ip, seg, strict=True) if s == "benign:campus")
    per_ip = {ip: {a for a, i, s in zip(e.account_id, e.ip, seg, strict=True) if i == ip}
              for ip in campus}  # fmt: skip
    assert len(per_ip) <= 4
    assert max(len(v) for v in per_ip.values()) >= 20
    v6 = [(a, ip) for a, ip, s in zip(e.account_id, e.ip, seg, strict=True)
          if s == "benign:ipv6_privacy"]  # fmt: skip
    nets = {(a, ipaddress.ip_network(f"{ip}/64", strict=False)) for a, ip in v6}
    assert len({ip for _, ip in v6}) > 2 * len(nets)  # addresses rotate inside stable /64s
    day = ((e.ts_s - scenario.params.start_s) // DAY_S).astype(int)
    signups = np.bincount(day[np.array(e.type) == "signup"], minlength=scenario.params.days)
    ratio = signups[scenario.params.promo_day] / np.median(signups)
    assert 3.5 < ratio < 7.0


# --- labels ------------------------------------------------------------------------------


def _label_frame(s: Scenario) -> tuple[np.ndarray, np.ndarray]:
    row = {eid: i for i, eid in enumerate(s.events.event_id)}
    idx = np.array([row[eid] for eid in s.labels.event_id])
    return idx, s.labels.labeled_at_s - s.events.ts_s[idx]


def test_labels_refer_to_events_after_them(scenario: Scenario) -> None:
    idx, delay = _label_frame(scenario)
    assert len(set(scenario.labels.event_id)) == len(idx)
    assert np.all(delay >= 0)
    assert np.array_equal(scenario.labels.is_fraud, scenario.is_fraud[idx])
    assert np.all(np.diff(scenario.labels.labeled_at_s) >= 0)
    end = scenario.params.start_s + scenario.params.days * DAY_S
    assert np.any(scenario.labels.labeled_at_s > end)  # late labels are kept


def _share_ok(hits: int, n: int, p: float) -> bool:
    """Within four binomial standard deviations."""
    return n > 0 and abs(hits / n - p) <= 4 * math.sqrt(p * (1 - p) / n) + 1e-9


@pytest.mark.parametrize(
    ("source", "types", "fraud", "share", "delay"),
    [
        ("chargeback", {"checkout"}, True, "chargeback_share", "chargeback_delay_days"),
        ("confirmed", {"signup", "login"}, True, "confirm_share", "confirm_delay_days"),
    ],
)
def test_fraud_label_coverage_and_delay(
    scenario: Scenario, source: str, types: set[str], fraud: bool, share: str, delay: str
) -> None:
    p = scenario.params
    kinds = np.array(scenario.events.type)
    pool = np.isin(kinds, list(types)) & (scenario.is_fraud == fraud)
    idx, delay_s = _label_frame(scenario)
    mine = pool[idx]
    assert _share_ok(int(mine.sum()), int(pool.sum()), getattr(p, share)), source
    lo, hi = getattr(p, delay)
    days = delay_s[mine] / DAY_S
    assert days.min() >= lo - 1e-6
    assert days.max() <= hi + 1e-6
    assert abs(days.mean() - (lo + hi) / 2) < 0.15 * (hi - lo)  # uniform over the range


def test_benign_labels_come_from_reviews_and_spot_checks(scenario: Scenario) -> None:
    p, e = scenario.params, scenario.events
    review = (np.array(e.current_decision) == "review") & ~scenario.is_fraud
    idx, delay_s = _label_frame(scenario)
    assert not scenario.labels.is_fraud[review[idx]].any()
    assert _share_ok(int(review[idx].sum()), int(review.sum()), p.cleared_share)
    checkout = (np.array(e.type) == "checkout") & ~scenario.is_fraud & ~review
    assert _share_ok(int(checkout[idx].sum()), int(checkout.sum()), p.audit_share)
    lo, hi = p.audit_delay_days
    assert np.all((delay_s[checkout[idx]] >= lo * DAY_S) & (delay_s[checkout[idx]] <= hi * DAY_S))
    assert 0.5 <= scenario.labels.is_fraud.sum() / scenario.is_fraud.sum() <= 0.7


# --- identifiers against reference sources ----------------------------------------------


def _special_networks() -> list[tuple[ipaddress.IPv4Network | ipaddress.IPv6Network, str]]:
    with (DATA / "scenario_special_purpose.csv").open(newline="") as f:
        return [(ipaddress.ip_network(r["network"]), r["source"]) for r in csv.DictReader(f)]


def test_special_purpose_table_rows_name_a_source() -> None:
    rows = _special_networks()
    assert len(rows) >= 40
    assert all("IANA" in src and "RFC" in src for _, src in rows)


def test_no_address_in_a_special_purpose_range(scenario: Scenario) -> None:
    """IANA special-purpose registries (table rows name each RFC); RFC 4291 section 2.4 for the
    global unicast block 2000::/3. `ipaddress.is_global` as a second opinion (its flags moved
    between CPython patch releases, so the table is the authority)."""
    table = _special_networks()
    unicast6 = ipaddress.ip_network("2000::/3")
    addresses = {ipaddress.ip_address(ip) for ip in scenario.events.ip if ip}
    assert {a.version for a in addresses} == {4, 6}
    for addr in addresses:
        hits = [src for net, src in table if net.version == addr.version and addr in net]
        assert not hits, (str(addr), hits)
        assert addr.is_global, str(addr)
        if addr.version == 6:
            assert addr in unicast6, str(addr)
        assert str(addr) == str(ipaddress.ip_address(str(addr)))  # canonical text (RFC 5952)


def test_phones_parse_and_are_valid(scenario: Scenario) -> None:
    """`phonenumbers` (libphonenumber port) is the reference: every number parses without a
    default region; only the configured share of benign typos is invalid."""
    phones = {(ph, f) for ph, f in zip(scenario.events.phone, scenario.is_fraud, strict=True) if ph}
    invalid: Counter[bool] = Counter()
    for ph, fraud in phones:
        number = phonenumbers.parse(ph, None)
        if not phonenumbers.is_valid_number(number):
            invalid[fraud] += 1
    assert invalid[True] == 0
    assert invalid[False] <= max(5, 3 * scenario.params.phone_typo_share * len(phones))
    regions = Counter(phonenumbers.region_code_for_number(phonenumbers.parse(p)) for p, _ in phones)
    assert {"GB", "IE", "AU", "NZ", "US", "CA"} <= set(regions)


@pytest.mark.parametrize(
    ("number", "source"),
    [
        ("+441134960000", "Ofcom drama range 0113 496 0xxx (from memory)"),
        ("+442079460999", "Ofcom drama range 020 7946 0xxx (from memory)"),
        ("+61491570156", "ACMA fiction range 0491 570 xxx (from memory)"),
        ("+61255501234", "ACMA fiction range (02) 5550 xxxx (from memory)"),
        ("+12125550100", "NANPA 555-0100..0199 fiction numbers (from memory)"),
    ],
)
def test_fiction_ranges_used_are_valid_for_phonenumbers(number: str, source: str) -> None:
    assert phonenumbers.is_valid_number(phonenumbers.parse(number, None)), source


def test_phonenumbers_rejects_the_uk_mobile_drama_block() -> None:
    """Why the generator leaves out 07700 900xxx (Ofcom drama range, from memory)."""
    assert not phonenumbers.is_valid_number(phonenumbers.parse("+447700900123", None))


def test_every_domain_is_reserved(scenario: Scenario) -> None:
    """RFC 2606 section 2 and RFC 6761 section 6 reserve .example and .test; the Public Suffix
    List (publicsuffixlist) must see each as a registrable name under those labels."""
    psl = PublicSuffixList()
    domains = {e.rsplit("@", 1)[1] for e in scenario.events.email if e}
    assert len(domains) > 50
    for d in domains:
        assert d.endswith((".example", ".test")), d
        assert psl.privatesuffix(d) == d.lower(), d
        assert d not in blocklist


def _shape(text: str) -> str:
    return re.sub(r"[a-z]+", "a", re.sub(r"[0-9]+", "9", text.lower()))


def _hex_shape(text: str) -> str:
    return re.sub(r"[0-9a-f]", "x", text)


def test_spelling_does_not_give_fraud_away(scenario: Scenario) -> None:
    """Every way an attacker's identifier is spelled also occurs among benign users."""
    e, fraud = scenario.events, scenario.is_fraud
    fields: dict[str, tuple[list[str | None], Callable[[str], str]]] = {
        "device": (e.device_id, _hex_shape),
        "account": (e.account_id, _hex_shape),
        "event": (list(e.event_id), _hex_shape),
        "phone": (e.phone, lambda p: re.sub(r"\d", "9", p)),
        "email_local": (e.email, lambda m: _shape(m.split("@")[0])),
        "tld": (e.email, lambda m: m.rsplit(".", 1)[1]),
        "ip_version": (e.ip, lambda ip: str(ipaddress.ip_address(ip).version)),
    }
    for name, (column, shape) in fields.items():
        bad = {shape(v) for v, f in zip(column, fraud, strict=True) if v and f}
        good = {shape(v) for v, f in zip(column, fraud, strict=True) if v and not f}
        assert bad <= good, (name, bad - good)


# --- the rules in force -------------------------------------------------------------------


def _brute_force(e: EventTable, rules: RuleSet) -> dict[str, np.ndarray]:
    """Each rule straight from its definition, scanning all earlier events for every event."""
    n, ts = len(e), np.round(e.ts_s * 1000).astype(np.int64)
    kinds = np.array(e.type)
    out = {k: np.zeros(n, dtype=bool) for k in ("signup_ip_velocity", "device_accounts",
           "young_account_amount", "high_amount", "blocked_domain", "blocked_network")}  # fmt: skip
    nets = [ipaddress.ip_network(x) for x in rules.blocked_networks]
    for i in range(n):
        prior = range(i + 1)
        if kinds[i] == "signup" and e.ip[i]:
            k = sum(1 for j in prior if kinds[j] == "signup" and e.ip[j] == e.ip[i]
                    and ts[j] > ts[i] - 3_600_000)  # fmt: skip
            out["signup_ip_velocity"][i] = k > rules.signup_ip_max_per_hour
        if e.device_id[i]:
            accs = {e.account_id[j] for j in prior if e.device_id[j] == e.device_id[i]
                    and ts[j] > ts[i] - 86_400_000}  # fmt: skip
            out["device_accounts"][i] = len(accs) > rules.device_accounts_max_per_day
        if kinds[i] == "checkout":
            ups = [ts[j] for j in range(i) if kinds[j] == "signup"
                   and e.account_id[j] == e.account_id[i]]  # fmt: skip
            young = bool(ups) and ts[i] - ups[0] < rules.young_account_age_s * 1000
            out["young_account_amount"][i] = young and e.amount[i] > rules.young_account_amount
            out["high_amount"][i] = e.amount[i] > rules.high_amount
        email, ip = e.email[i], e.ip[i]
        if email:
            dom = email.split("@")[1].lower()
            out["blocked_domain"][i] = dom in rules.blocked_domains or dom in blocklist
        if ip:
            out["blocked_network"][i] = any(ipaddress.ip_address(ip) in net for net in nets)
    return out


@pytest.mark.parametrize("tight", [False, True], ids=["scenario thresholds", "tight thresholds"])
def test_rules_match_brute_force(small: Scenario, tight: bool) -> None:
    rules = small.rules
    if tight:
        rules = RuleSet(
            1, 1, 7 * DAY_S, 100.0, 500.0, rules.blocked_domains, rules.blocked_networks
        )
    fast, slow = rule_hits(small.events, rules), _brute_force(small.events, rules)
    for name in slow:
        assert np.array_equal(fast[name], slow[name]), name
        if tight or name != "signup_ip_velocity":
            assert slow[name].any(), f"{name} never fires: the check is empty"
    if not tight:
        assert small.events.current_decision == rules_in_force(small.events, rules)


def _table(rows: list[tuple[float, str, str, str | None, str | None, float]]) -> EventTable:
    n = len(rows)
    return EventTable(
        event_id=[f"e{i}" for i in range(n)], ts_s=np.array([r[0] for r in rows]),
        type=[r[1] for r in rows], account_id=[r[2] for r in rows], ip=[r[3] for r in rows],
        device_id=[r[4] for r in rows], phone=[None] * n,
        email=[f"u{i}@shop.example" for i in range(n)], amount=np.array([r[5] for r in rows]),
        current_decision=[None] * n,
    )  # fmt: skip


def test_windows_exclude_their_left_edge() -> None:
    """(t - window, t]: an event exactly one hour earlier no longer counts."""
    rules = RuleSet(signup_ip_max_per_hour=1)
    e = _table([(0.0, "signup", "a", "11.0.0.1", None, math.nan),
                (3600.0, "signup", "b", "11.0.0.1", None, math.nan),
                (3600.5, "signup", "c", "11.0.0.1", None, math.nan)])  # fmt: skip
    assert rules_in_force(e, rules) == ["allow", "allow", "deny"]


def test_young_account_and_amount_rules() -> None:
    e = _table([(0.0, "signup", "a", "11.0.0.1", "d1", math.nan),
                (60.0, "checkout", "a", "11.0.0.1", "d1", 300.0),
                (90_000.0, "checkout", "a", "11.0.0.1", "d1", 300.0),
                (90_001.0, "checkout", "old", "11.0.0.2", "d2", 2_500.0)])  # fmt: skip
    assert rules_in_force(e) == ["allow", "review", "allow", "review"]


def test_rules_refuse_unsorted_events() -> None:
    e = _table([(10.0, "login", "a", None, None, math.nan), (5.0, "login", "a", None, None, 1.0)])
    with pytest.raises(RuleInputError, match="time order"):
        rules_in_force(e)


def test_rules_flag_rate_and_who_they_catch(scenario: Scenario) -> None:
    d = np.array(scenario.events.current_decision)
    seg = np.array(scenario.segment)
    flagged = d != "allow"
    assert 0.008 <= flagged.mean() <= 0.03
    assert flagged[seg == "attack:device_farm"].mean() > 0.3  # fast and blatant: partly caught
    for shape in ("slow_campaign", "takeover", "proxy_rotation"):
        assert flagged[seg == f"attack:{shape}"].mean() < 0.25, shape
    assert flagged[~scenario.is_fraud].mean() < 0.01


# --- parameters -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("change", "name"),
    [
        ({"n_events": 10}, "n_events"),
        ({"days": 7}, "days"),
        ({"fraud_share": 1.5}, "fraud_share"),
        ({"attack_mix": {"phishing": 1.0}}, "attack_mix"),
        ({"promo_day": 99}, "promo_day"),
        ({"chargeback_delay_days": (5.0, 1.0)}, "chargeback_delay_days"),
    ],
)
def test_bad_parameters_name_the_knob(change: dict[str, object], name: str) -> None:
    with pytest.raises(ScenarioError, match=name):
        ScenarioParams(**change)  # type: ignore[arg-type]


# --- files ---------------------------------------------------------------------------------


@pytest.mark.parametrize("ext", ["csv", "jsonl", "parquet"])
def test_stream_round_trips_through_the_file_formats(tmp_path: Path, ext: str) -> None:
    """The generated stream is a valid events file: read back without a reject, unchanged."""
    from service.files import read_events, read_labels, write_events, write_labels

    s = generate(ScenarioParams(n_events=2_000, seed=8))
    write_events(tmp_path / f"events.{ext}", s.events)
    write_labels(tmp_path / f"labels.{ext}", s.labels)
    events = read_events(tmp_path / f"events.{ext}")
    labels = read_labels(tmp_path / f"labels.{ext}")
    assert events.rows_rejected == 0
    for name in ("event_id", "type", "account_id", "ip", "device_id", "phone", "email"):
        assert getattr(events.table, name) == getattr(s.events, name), name
    assert events.table.current_decision == s.events.current_decision
    assert np.array_equal(events.table.ts_s, s.events.ts_s)
    assert np.array_equal(events.table.amount, s.events.amount, equal_nan=True)
    assert labels.table.event_id == s.labels.event_id
    assert np.array_equal(labels.table.is_fraud, s.labels.is_fraud)
