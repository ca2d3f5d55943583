"""Column keys of distinct raw values (`scoring.batch_identifiers`) equal the normalisers'.

The column path exists only for speed: for every value it either gives exactly the keys (and no
flags) that the per-field normaliser gives, or leaves the value to that normaliser. Each case
below names the rule of `scoring.identifiers` or `scoring.identifiers_ip` it touches; the
reference is the normaliser itself.
"""

from __future__ import annotations

import dataclasses
import ipaddress

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given
from hypothesis import strategies as st

from scoring.batch_identifiers import column_keys
from scoring.batch_plan import FIELDS, ColumnPlanner
from scoring.config import ScoringConfig
from scoring.event import Event, Planner, maturity_sampled
from scoring.hashing import KeyHasher
from scoring.identifiers import field_normaliser

OPAQUE_CASES = [
    "acct-1",  # plain
    "a",  # one character
    "Dev 42",  # an inner blank is kept
    " acct-1",  # leading blank: trimmed (str.strip)
    "acct-1\t",  # trailing tab: trimmed
    "acct\x1f",  # ASCII unit separator: str.strip trims it
    "null",  # placeholder
    "NULL",  # placeholder, any case
    "n/a",  # placeholder with a slash
    "(null)",
    "{}",
    "0",  # zeros: placeholder
    "00000000-0000-0000-0000-000000000000",  # the all-zero UUID
    "--",
    "0-1",  # not only zeros and dashes
    "ａｃｃｔ",  # full width: NFKC
    "é",  # non-ASCII
    "a\x00b",  # a control character inside
    "x" * 256,  # longest kept whole
    "x" * 257,  # truncated and flagged
]  # (no lone surrogates: Arrow columns, and so the batch path, cannot hold them)
IP_CASES = [
    "11.22.33.44",
    "0.0.0.0",  # special
    "10.1.2.3",  # private-use
    "100.64.0.1",  # shared address space
    "192.0.0.9",
    "255.255.255.255",
    "1.2.3.256",  # not an address
    "01.2.3.4",  # leading zero: not canonical
    "1.2.3",
    "1.2.3.4.5",
    "1.2.3.4:80",  # port
    " 8.8.8.8 ",  # blanks
    "１.2.3.4",  # full width
    "2001:db8::1",
    "2a00:1450::1",
    "2c03:70a8:c32:7225:f62a:b22c:238e:429d",  # eight groups, canonical as written
    "2C03:70a8:c32:7225:f62a:b22c:238e:429d",  # upper case: RFC 5952 lowers it
    "2c03:70a8:0c32:7225:f62a:b22c:238e:429d",  # a leading zero: dropped
    "2c03:70a8:0:7225:f62a:b22c:238e:429d",  # one zero group: kept as 0
    "2c03:70a8:0:0:f62a:b22c:238e:429d",  # two: shortened to ::
    "2001:db8:1:2:3:4:5:6",  # documentation
    "2001:1:0:0:0:0:0:1",  # pcp-anycast, a /128
    "2001:1:0:0:0:0:0:9",  # in 2001::/23
    "2002:a0b:c0d:1:2:3:4:5",  # 6to4
    "3fff:1:2:3:4:5:6:7",  # documentation (RFC 9637)
    "4000:1:2:3:4:5:6:7",  # outside 2000::/3
    "1fff:1:2:3:4:5:6:7",
    "2620:4f:8000:1:2:3:4:5",  # direct-delegation-as112
    "2620:4f:8001:1:2:3:4:5",  # next to it
    "::ffff:11.22.33.44",
    "not an address",
]


EMAIL_CASES = [
    "jo@mail.example",  # plain
    "jo.doe_2-x@mail.example.co.uk",  # dots, underscore, dash; a registrable domain
    "Jo@Mail.Example",  # capitals: folded
    " jo@mail.example",  # blank: trimmed
    "jo+promo@mail.example",  # subaddress: dropped and flagged
    "jo@mailinator.com",  # disposable (flagged)
    "jo@mail.notatld",  # unknown top-level domain (flagged)
    "jo@mail.example.",  # trailing dot on the domain
    "jo@co.uk",  # a public suffix, not registrable: invalid
    "jo@1.2.3.4",  # numeric top label: invalid
    "jo@-bad-.example",  # not an LDH label
    "jo@xn--bcher-kva.example",  # an A-label
    "jo@bücher.example",  # a U-label: encoded
    ".jo@mail.example",  # not a dot-atom
    "jo..doe@mail.example",
    "jo@@mail.example",
    "jo@",
    "@mail.example",
    "x" * 64 + "@mail.example",  # longest local part
    "x" * 65 + "@mail.example",  # too long
    "jo@" + "a" * 63 + "." + "b" * 63 + "." + "c" * 63 + "." + "d" * 50 + ".example",
    '"jo doe"@mail.example',  # quoted local part
]


def reference(field: str, values: list[str]) -> dict[str, list[str | None]]:
    """Per kind, the key each value gets from the normaliser (None: no key of that kind)."""
    normalise = field_normaliser(field)
    out: dict[str, list[str | None]] = {}
    for i, raw in enumerate(values):
        for kind, value in normalise(raw).keys:
            out.setdefault(kind, [None] * len(values))[i] = value
    return out


def check(field: str, values: list[str]) -> None:
    distinct = list(dict.fromkeys(values))
    column = pa.array(distinct, type=pa.string())
    keys, results, fast_flags = column_keys(field, column, field_normaliser(field))
    got = {kind: column.to_pylist() for kind, column in keys.items()}
    assert got == reference(field, distinct)
    assert list(got) == list(reference(field, distinct))  # kinds in order of first appearance
    left = {i for i, _ in results}
    flagged = {int(i): flags for at, flags in fast_flags for i in at}
    normalise = field_normaliser(field)
    for i, raw in enumerate(distinct):
        if i not in left:  # given by the column path: with the normaliser's flags
            assert normalise(raw).flags == flagged.get(i, frozenset()), raw
        else:
            assert i not in flagged
    for i, r in results:
        assert r == normalise(distinct[i])


@pytest.mark.parametrize("field", ["account_id", "device_id"])
def test_opaque_cases(field: str) -> None:
    check(field, OPAQUE_CASES)
    for case in OPAQUE_CASES:
        check(field, [case])


def test_ip_cases() -> None:
    check("ip", IP_CASES)
    for case in IP_CASES:
        check("ip", [case])


@given(st.lists(st.text(max_size=12), min_size=1, max_size=20))
def test_opaque_any_text(values: list[str]) -> None:
    values = [v for v in values if v]  # the reader turns "" into a missing value
    if values:
        check("device_id", values)


octet = st.integers(0, 300).map(str) | st.sampled_from(["00", "01", "255", "", "a"])


@given(st.lists(st.tuples(octet, octet, octet, octet).map(".".join), min_size=1, max_size=20))
def test_ip_any_dotted_text(values: list[str]) -> None:
    check("ip", [v for v in values if v])


hextet = st.integers(0, 0xFFFF).map(lambda g: f"{g:x}") | st.sampled_from(["0", "00", "A", ""])
first_hextet = st.integers(0x1F00, 0x4100).map(lambda g: f"{g:x}") | st.sampled_from(["2001"])


@given(
    st.lists(
        st.tuples(first_hextet, st.lists(hextet, min_size=6, max_size=8)).map(
            lambda t: ":".join([t[0], *t[1]])
        ),
        min_size=1,
        max_size=20,
    )
)
def test_ip_any_colon_text(values: list[str]) -> None:
    check("ip", values)


@given(st.integers(0x2000 << 112, (0x4000 << 112) - 1))
def test_ip_every_global_unicast_spelling(value: int) -> None:
    """Full, canonical and expanded spellings of addresses in 2000::/3 (special ones too)."""
    groups = [(value >> (112 - 16 * i)) & 0xFFFF for i in range(8)]
    check("ip", [":".join(f"{g:x}" for g in groups), str(ipaddress.IPv6Address(value))])


def test_email_cases() -> None:
    check("email", EMAIL_CASES)
    for case in EMAIL_CASES:
        check("email", [case])


local = st.text(alphabet="abz09_-.+A", min_size=0, max_size=8)
domain = st.sampled_from(
    ["mail.example", "example.co.uk", "mailinator.com", "x.notatld", "co.uk", "a-.example", "b.c"]
)


@given(st.lists(st.tuples(local, domain).map("@".join), min_size=1, max_size=20))
def test_email_any_text(values: list[str]) -> None:
    check("email", values)


def test_no_value_is_its_own_key_in_a_field_without_a_column_path() -> None:
    keys, results, _ = column_keys(
        "phone", pa.array(["+44 20 7946 0321"]), field_normaliser("phone")
    )
    assert keys["phone"].to_pylist() == ["+442079460321"]
    assert [i for i, _ in results] == [0]


def test_planned_columns_equal_the_per_event_planner() -> None:
    """Ids, buckets and flags of a mixed batch equal the per-event `Planner`'s digests."""
    config = ScoringConfig()
    hasher = KeyHasher(b"column-keys-secret")
    n = len(OPAQUE_CASES) * 2
    fields = {
        "account_id": [*OPAQUE_CASES, *OPAQUE_CASES[::-1]],
        "device_id": [*OPAQUE_CASES[::-1], *OPAQUE_CASES],
        "ip": [IP_CASES[i % len(IP_CASES)] for i in range(n)],
        "phone": [None] * n,
        "email": [EMAIL_CASES[i % len(EMAIL_CASES)] for i in range(n)],
    }
    ids = [f"e{i}" for i in range(n)]
    ts = np.arange(n, dtype=np.float64) + 1_790_000_000.0
    cols = ColumnPlanner(config, hasher).plan(ids, ts, ["login"] * n, np.full(n, np.nan), fields)
    planner = Planner(config, hasher)
    for row in range(n):
        raw = {f: fields[f][row] for f in FIELDS}
        plan = planner.plan(Event(ids[row], float(ts[row]), "login", **raw))
        got = {
            kind: cols.digests[kind][cols.ids[kind][row]]
            for kind in config.kinds
            if cols.ids[kind][row] >= 0
        }
        assert got == dict(plan.identifiers)


@given(st.lists(st.text(min_size=1, max_size=30), max_size=30), st.floats(1e-6, 1.0))
def test_sampled_events_equal_the_per_event_draw(event_ids: list[str], rate: float) -> None:
    """The planner's sample of events to learn once matured is `maturity_sampled`'s, event by
    event, at any rate (the batch path computes the checksums column-wise)."""
    config = dataclasses.replace(ScoringConfig(), negative_sample_rate=rate)
    planner = ColumnPlanner(config, KeyHasher(b"column-keys-secret"))
    expected = [maturity_sampled(e, rate) for e in event_ids]
    assert planner._sampled(event_ids).tolist() == expected
