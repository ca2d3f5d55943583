"""Invented e-mail addresses for the demo scenario.

Every domain is a made-up name under the reserved `.example` and `.test` top-level domains
(RFC 2606 section 2, RFC 6761 section 6), so no address can reach anyone. Popularity is skewed the
way mail is in practice: a few large providers carry most users, then ISP mailboxes, a long tail of
small providers and company domains (the shares are invented, common practice, no source).
Attackers draw from the same generators: a throwaway domain is spelled like any small domain.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def _words(text: str) -> list[str]:
    return text.split()


BUSINESS_DOMAIN = "quillfern.example"
LARGE_PROVIDERS = (
    "kestrelmail.example", "driftpost.example", "boxwillow.example",
    "lanternpost.test", "mailmeadow.example", "pebblebox.example",
)  # fmt: skip
LARGE_WEIGHTS = np.array([0.30, 0.22, 0.16, 0.12, 0.12, 0.08])
# Share of users per kind of domain: large providers, ISP mailboxes, small providers, companies.
KIND_SHARES = np.array([0.72, 0.08, 0.10, 0.10])

FIRST_NAMES = _words(
    "amara ben chloe dev elena finn grace hassan isla jamal kavya liam maya noah olu priya "
    "quinn rosa sam tariq uma vera wei yusuf zoe aisha bruno carmen dmitri esme farah george "
    "hana ivan jade kofi lena marco nadia oscar paula rahul sofia tom ursula viktor willa "
    "xena yara zain alice bea connor daria emil freya gus holly ines jonah"
)
SURNAMES = _words(
    "ashworth banerjee castillo dunmore eriksen fairley gallagher hoshino iwu jablonski kerr "
    "lindqvist mbeki novak okafor pemberton quayle rahman silva thornton ulrich vance "
    "whitlock xu yilmaz zielinski abbott brennan chowdhury delacroix evans fitzroy gupta holm "
    "ito jensen kowalski lowe moreau nakamura oduya petrov reyes santos tanaka varga walsh "
    "young zhang"
)
WORDS = _words(
    "amber birch cinder dapple ember fennel gale harbour ivory juniper kelp lark moss nimbus "
    "otter pine quartz rowan sorrel tansy umbra vale willow yarrow zest copper heron lumen"
)
_ONSETS = _words("b br c cl d dr f g gr h k l m n p pl r s sk st t th v w")
_VOWELS = _words("a e i o u ai ea oo ie ou")
_CODAS = _words("n r l m sk th x ck ll rn nd st")
_PROVIDER_TAILS = _words("mail post box net inbox hub")
_COMPANY_TAILS = _words("joinery logistics design labs dental studio supply legal works foods")
_PLUS_TAGS = _words("shop market buy orders quillfern deals bikes gear")


def _pick(rng: np.random.Generator, items: list[str], n: int) -> list[str]:
    return [items[i] for i in rng.integers(0, len(items), size=n)]


def pseudo_words(rng: np.random.Generator, n: int) -> list[str]:
    """`n` pronounceable made-up words of two syllables."""
    cols = [_pick(rng, part, n) for _ in range(2) for part in (_ONSETS, _VOWELS, _CODAS)]
    return ["".join(p) for p in zip(*cols, strict=True)]


def _tlds(rng: np.random.Generator, n: int) -> list[str]:
    return [".example" if u < 0.8 else ".test" for u in rng.random(n)]


def small_domains(rng: np.random.Generator, n: int) -> list[str]:
    """Small mail providers' domains; attackers' throwaway domains come from here too."""
    tails = [
        t if u < 0.6 else ""
        for t, u in zip(_pick(rng, _PROVIDER_TAILS, n), rng.random(n), strict=True)
    ]
    return [w + t + d for w, t, d in zip(pseudo_words(rng, n), tails, _tlds(rng, n), strict=True)]


def company_domains(rng: np.random.Generator, n: int) -> list[str]:
    tails = _pick(rng, _COMPANY_TAILS, n)
    return [
        f"{w}-{t}{d}" for w, t, d in zip(pseudo_words(rng, n), tails, _tlds(rng, n), strict=True)
    ]


def _zipf_weights(n: int, exponent: float) -> np.ndarray:
    w = 1.0 / np.arange(1, n + 1) ** exponent
    return np.asarray(w / w.sum())


class DomainBook:
    """Which domain each new user's mailbox is on."""

    def __init__(self, rng: np.random.Generator, n_isps: int, scale: float) -> None:
        self._rng = rng
        self._taken: set[str] = {BUSINESS_DOMAIN, *LARGE_PROVIDERS}
        self.isp_domains = self._fresh(small_domains, n_isps)
        self.small = self._fresh(small_domains, max(20, round(400 * scale)))
        self.company = self._fresh(company_domains, max(40, round(800 * scale)))
        self._small_w = _zipf_weights(len(self.small), 1.1)
        self._company_w = _zipf_weights(len(self.company), 1.0)

    def _fresh(self, make: Callable[[np.random.Generator, int], list[str]], n: int) -> list[str]:
        out: list[str] = []
        while len(out) < n:
            for name in make(self._rng, n - len(out)):
                if name not in self._taken:
                    self._taken.add(name)
                    out.append(name)
        return out

    def new_small_domains(self, k: int) -> list[str]:
        """`k` domains never used before (a throwaway service appearing)."""
        return self._fresh(small_domains, k)

    def draw(self, isp: np.ndarray) -> list[str]:
        """One domain per user; `isp` is each user's home ISP (for ISP mailboxes)."""
        rng, n = self._rng, len(isp)
        kind = rng.choice(4, size=n, p=KIND_SHARES)
        out = np.empty(n, dtype=object)
        pools = (list(LARGE_PROVIDERS), self.isp_domains, self.small, self.company)
        weights = (LARGE_WEIGHTS, None, self._small_w, self._company_w)
        for k, (pool, w) in enumerate(zip(pools, weights, strict=True)):
            sel = kind == k
            if k == 1:
                idx = np.asarray(isp)[sel]
            else:
                idx = rng.choice(len(pool), size=int(sel.sum()), p=w)
            out[sel] = np.array(pool, dtype=object)[idx]
        return [str(d) for d in out]


_STYLE_SHARES = [0.24, 0.12, 0.05, 0.1, 0.12, 0.15, 0.05, 0.17]


def _local_part(style: int, first: str, last: str, num: int, w1: str, w2: str) -> str:
    if style == 0:
        return f"{first}.{last}"
    if style == 1:
        return first + last
    if style == 2:
        return f"{first}_{last}"
    if style == 3:
        return first[0] + last
    if style == 4:
        return f"{first}.{last}{num % 100}"
    if style == 5:
        return f"{first}{1958 + num % 51}"
    if style == 6:
        return f"{last}.{first}"
    return f"{w1}{w2}{num}"


class MailBook:
    """Unique mailbox names: name-based local parts in the styles people pick."""

    def __init__(self, rng: np.random.Generator, plus_share: float, capital_share: float) -> None:
        self._rng = rng
        self._plus_share = plus_share
        self._capital_share = capital_share
        self._used: set[str] = set()

    def addresses(self, domains: list[str]) -> list[str]:
        """A fresh address per domain, unique (ignoring case and +tags) among all handed out."""
        rng, n = self._rng, len(domains)
        styles = rng.choice(len(_STYLE_SHARES), size=n, p=_STYLE_SHARES)
        cols = (_pick(rng, FIRST_NAMES, n), _pick(rng, SURNAMES, n), rng.integers(1, 1000, n))
        words = (_pick(rng, WORDS, n), _pick(rng, WORDS, n))
        capital = rng.random(n) < self._capital_share
        tags = [
            t if u < self._plus_share else ""
            for t, u in zip(_pick(rng, _PLUS_TAGS, n), rng.random(n), strict=True)
        ]
        digits = rng.integers(0, 10, size=(n, 8))
        out = []
        for i, domain in enumerate(domains):
            local = _local_part(
                int(styles[i]), cols[0][i], cols[1][i], int(cols[2][i]), words[0][i], words[1][i]
            )
            extra = 0
            while f"{local}@{domain}" in self._used:
                local += str(digits[i, extra % 8])
                extra += 1
            self._used.add(f"{local}@{domain}")
            if capital[i]:
                local = local[0].upper() + local[1:]
            if tags[i]:
                local += "+" + tags[i]
            out.append(f"{local}@{domain}")
        return out
