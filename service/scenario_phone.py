"""Invented phone numbers for the demo scenario.

Numbers come first from ranges that regulators set aside for drama and fiction, as far as
`phonenumbers` accepts them as valid (it rejects some, e.g. the UK mobile drama block 07700 900xxx
and 01632 960xxx, so those are not used). The ranges below are written from memory of the Ofcom
(UK), ACMA (Australia) and NANPA (North America) lists. Where a country needs more, or mobile
numbers that no accepted fiction range offers, numbers are drawn inside the valid national plan:
random digits after a mobile leading digit, kept only when `phonenumbers` says valid.
"""

from __future__ import annotations

import re
from functools import cache

import numpy as np
import phonenumbers

# Countries the invented marketplace sells in: (region, share of users, UTC offset in September,
# daylight saving ignored).
COUNTRIES = (("GB", 0.52, 1), ("IE", 0.08, 1), ("AU", 0.16, 10), ("NZ", 0.05, 12),
             ("US", 0.14, -5), ("CA", 0.05, -5))  # fmt: skip
COUNTRY_SHARES = np.array([c[1] for c in COUNTRIES])
UTC_OFFSETS_H = np.array([c[2] for c in COUNTRIES])

# Drama ranges, from memory: (first digits of the national number, number of free trailing
# digits). UK: 0113/0114/0116/0117/0118/0121/0131/0141/0151/0161 496 0xxx,
# 0191 498 0xxx, 020 7946 0xxx, 028 9649 6xxx, 029 2018 0xxx. Australia: 0491 570 xxx and the
# (02)/(03)/(07)/(08) 5550 xxxx and 7010 xxxx sets.
_GB_LANDLINE = [(p, 3) for p in (
    "1134960", "1144960", "1164960", "1174960", "1184960", "1214960", "1314960", "1414960",
    "1514960", "1614960", "1914980", "2079460", "2896496", "2920180")]  # fmt: skip
_AU_MOBILE = [("491570", 3)]
_AU_LANDLINE = [(f"{a}{b}", 4) for a in "2378" for b in ("5550", "7010")]
# Leading digits of personal mobile numbers (no pagers, personal numbering or VoIP) and the
# national number length, per region; NANP regions use their area codes instead.
_MOBILE_LEADS = {
    "GB": (("71", "72", "73", "74", "75", "77", "78", "79"), 10),
    "IE": (("83", "85", "86", "87", "89"), 9),
    "AU": (("4",), 9),
    "NZ": (("21", "22", "27"), 9),
}
_CALLING_CODE = {"GB": 44, "IE": 353, "AU": 61, "NZ": 64, "US": 1, "CA": 1}


@cache
def _plan_desc(region: str, kind: str) -> tuple[re.Pattern[str], frozenset[int]]:
    """The national number pattern and lengths `phonenumbers` holds for a region's line kind."""
    meta = phonenumbers.PhoneMetadata.metadata_for_region(region)
    desc = None if meta is None else meta.mobile if kind == "mobile" else meta.fixed_line
    if meta is None or desc is None or meta.general_desc is None:
        raise ValueError(f"phonenumbers has no {kind} plan for region {region}")
    lengths = desc.possible_length or meta.general_desc.possible_length
    return re.compile(str(desc.national_number_pattern)), frozenset(lengths)


def in_plan(region: str, national: str, kind: str) -> bool:
    """Does `national` match `region`'s numbering plan for `kind` (mobile or landline)?

    This reads the same metadata `phonenumbers.is_valid_number` uses, one pattern instead of
    all, which makes it fast enough to draw hundreds of thousands of numbers; the tests check
    every generated number with `phonenumbers.is_valid_number` itself.
    """
    pattern, lengths = _plan_desc(region, kind)
    return len(national) in lengths and pattern.fullmatch(national) is not None


def is_valid(region: str, national: str) -> bool:
    return in_plan(region, national, "mobile") or in_plan(region, national, "landline")


@cache
def nanp_area_codes(region: str) -> tuple[str, ...]:
    """Area codes whose 555-01xx numbers are ordinary lines of `region` for `phonenumbers`."""
    return tuple(str(npa) for npa in range(201, 1000) if in_plan(region, f"{npa}5550100", "mobile"))


def _fiction_ranges(region: str, kind: str) -> list[tuple[str, int]]:
    """(first national digits, free trailing digits) of the fiction ranges for region and kind."""
    if region in ("US", "CA"):  # NANP 555-0100 to 555-0199 in every area code
        return [(f"{npa}55501", 2) for npa in nanp_area_codes(region)]
    if region == "GB" and kind == "landline":
        return _GB_LANDLINE
    if region == "AU":
        return _AU_MOBILE if kind == "mobile" else _AU_LANDLINE
    return []


class PhoneBook:
    """Hands out unique valid numbers, as E.164 text, per region and kind (mobile or landline)."""

    def __init__(self, rng: np.random.Generator, landline_share: float) -> None:
        self._rng = rng
        self._landline_share = landline_share
        self._used: set[tuple[str, str]] = set()

    def _take(self, region: str, national: str) -> str | None:
        if (region, national) in self._used:
            return None
        self._used.add((region, national))
        return f"+{_CALLING_CODE[region]}{national}"

    def from_ranges(self, region: str, ranges: list[tuple[str, int]], n: int) -> list[str]:
        """Up to `n` unused valid numbers from the given ranges (fewer when they run out)."""
        out: list[str] = []
        if not ranges or n <= 0:
            return out
        picks = self._rng.integers(0, len(ranges), 4 * n + 8)
        tails = self._rng.integers(0, 10**9, 4 * n + 8)
        for k, tail in zip(picks.tolist(), tails.tolist(), strict=True):
            lead, free = ranges[k]
            national = lead + str(tail % 10**free).zfill(free)
            if is_valid(region, national) and (num := self._take(region, national)):
                out.append(num)
                if len(out) == n:
                    break
        return out

    def _plan_candidates(self, region: str, n: int) -> list[str]:
        rng = self._rng
        if region in ("US", "CA"):
            npa = nanp_area_codes(region)
            picks, exchange = rng.integers(0, len(npa), n), rng.integers(2, 10, n)
            heads = [
                npa[i] + str(d) for i, d in zip(picks.tolist(), exchange.tolist(), strict=True)
            ]
            length = 10
        else:
            leads, length = _MOBILE_LEADS[region]
            heads = [leads[i] for i in rng.integers(0, len(leads), n).tolist()]
        tails = rng.integers(0, 10**9, n).tolist()
        return [h + str(t).zfill(9)[: length - len(h)] for h, t in zip(heads, tails, strict=True)]

    def from_plan(self, region: str, n: int) -> list[str]:
        """`n` unused mobile numbers drawn inside `region`'s plan, each checked valid."""
        out: list[str] = []
        while len(out) < n:
            for national in self._plan_candidates(region, 2 * (n - len(out)) + 4):
                if in_plan(region, national, "mobile") and (num := self._take(region, national)):
                    out.append(num)
                    if len(out) == n:
                        break
        return out

    def draw(self, region: str, n: int) -> list[str]:
        """`n` numbers for users in `region`: fiction ranges where they exist, then the plan."""
        is_land = self._rng.random(n) < self._landline_share
        out = np.empty(n, dtype=object)
        for kind, sel in (("landline", is_land), ("mobile", ~is_land)):
            k = int(sel.sum())
            # The only mobile fiction range outside NANP is small: spread it thin so that one
            # prefix does not hold a whole country's mobiles.
            k_fiction = k if kind == "landline" or region in ("US", "CA") else k // 8
            got = self.from_ranges(region, _fiction_ranges(region, kind), k_fiction)
            got += self.from_plan(region, k - len(got))
            out[sel] = np.array(got, dtype=object)
        return [str(x) for x in out]

    def block(self, region: str, n: int) -> list[str]:
        """`n` numbers sharing one block of the mobile plan (bought in bulk from one provider)."""
        free = 3 if n <= 600 else 4 if n <= 6000 else 5
        cc_len = len(str(_CALLING_CODE[region])) + 1
        for _ in range(200):
            head = self.from_plan(region, 1)[0][cc_len:]
            self._used.discard((region, head))
            got = self.from_ranges(region, [(head[: len(head) - free], free)], n)
            if len(got) == n:
                return got
            for num in got:  # give back a partial block and try another
                self._used.discard((region, num[cc_len:]))
        raise RuntimeError(f"no block of {n} free numbers found in {region}")


def display(
    rng: np.random.Generator, numbers: list[str | None], spaced_share: float
) -> list[str | None]:
    """Numbers as users typed them: mostly E.164, some in international format with spaces."""
    spaced = rng.random(len(numbers)) < spaced_share
    codes = sorted({str(c) for c in _CALLING_CODE.values()}, key=len, reverse=True)
    out: list[str | None] = []
    for num, sp in zip(numbers, spaced.tolist(), strict=True):
        cc = next((c for c in codes if num and num[1:].startswith(c)), None)
        if num is not None and sp and cc is not None:
            parsed = phonenumbers.PhoneNumber(
                country_code=int(cc), national_number=int(num[1 + len(cc) :])
            )
            num = phonenumbers.format_number(parsed, phonenumbers.PhoneNumberFormat.INTERNATIONAL)
        out.append(num)
    return out
