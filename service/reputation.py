"""One identifier's statistics as plain numbers: what ``GET /v1/reputation/...`` answers.

A raw value goes the same way as in an event: normalised by `scoring.identifiers` into the
canonical key of its kind, keyed-hashed, then looked up. The raw value is neither kept nor logged.
Which raw values each kind takes:

- ``account``, ``device``, ``ip``, ``phone``, ``email``: the value as an event would carry it;
- ``ip_net``: any address in the network, or the network in CIDR text (``203.0.113.0/24``;
  only the /24 of IPv4 and the /64 of IPv6 are tracked);
- ``phone_prefix``: any phone number with that prefix;
- ``email_domain``: a domain (reduced to its registrable domain) or any address in it.

The numbers are read with the scoring core's own functions (decayed counts, the feature reader's
smoothed bad rate, linear-counting fan-out), so they are the statistics the scorer sees.
"""

from __future__ import annotations

from datetime import UTC, datetime

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.decay import decayed_value
from scoring.fanout import RecentDistinct, standard_error
from scoring.features import FeatureReader, horizon_label
from scoring.fusion import sigmoid
from scoring.hashing import KeyHasher
from scoring.identifiers import (
    Normalised,
    normalise_email,
    normalise_ip,
    normalise_opaque,
    normalise_phone,
)
from scoring.identifiers_email import domain_info
from scoring.profile import Profile, TimeBasis


class UnknownKindError(ValueError):
    """A kind that is not tracked."""


class NoKeyError(ValueError):
    """A value that gives no key of the asked kind (not a valid address, say)."""


def _network(raw: str) -> Normalised:
    address, slash, bits = raw.strip().partition("/")
    found = normalise_ip(address)
    net = found.get("ip_net")
    if slash and net is not None and net.rpartition("/")[2] != bits.strip():
        return Normalised((), found.flags)  # another prefix length than the one tracked
    return found


def _domain(raw: str) -> Normalised:
    if "@" in raw:
        return normalise_email(raw)
    info = domain_info(raw.strip())
    if info is None:
        return Normalised((), frozenset({"email_invalid"}))
    return Normalised((("email_domain", info.registrable),), info.flags)


def canonical_key(kind: str, raw: str, default_region: str | None = None) -> str:
    """The canonical value under which ``raw`` is tracked as ``kind``.

    Raises `UnknownKindError` for a kind that is not an identifier kind, `NoKeyError` when the
    value gives no key of that kind.

    >>> canonical_key("ip_net", "11.22.33.44"), canonical_key("email_domain", "Mail.Example.co.uk")
    ('11.22.33.0/24', 'example.co.uk')
    """
    if kind in ("account", "device"):
        found = normalise_opaque(kind, raw)
    elif kind == "ip":
        found = normalise_ip(raw)
    elif kind == "ip_net":
        found = _network(raw)
    elif kind in ("phone", "phone_prefix"):
        found = normalise_phone(raw, default_region)
    elif kind == "email":
        found = normalise_email(raw)
    elif kind == "email_domain":
        found = _domain(raw)
    else:
        raise UnknownKindError(f"unknown kind; use one of {', '.join(KIND_LETTERS)}")
    key = found.get(kind)
    if key is None:
        flags = f" ({', '.join(sorted(found.flags))})" if found.flags else ""
        raise NoKeyError(f"the value gives no {kind} key{flags}")
    return key


def _iso(t_s: float) -> str:
    return datetime.fromtimestamp(t_s, UTC).isoformat().replace("+00:00", "Z")


class Reputation:
    """Turns raw identifier values into keys, and profiles into plain statistics.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> rep = Reputation(cfg, KeyHasher(b"demo-secret"))
    >>> kind, digest = rep.key("device", " dev-42 ")
    >>> p = Profile(cfg)
    >>> p.record(TimeBasis.at(1_790_000_000.0, cfg), (), None)
    >>> stats = rep.statistics(kind, digest, p, 1_790_003_600.0)
    >>> stats["events"]["1h"], stats["age_days"], stats["first_seen"]
    (0.5, 0.041667, '2026-09-21T14:13:20Z')
    """

    def __init__(
        self, config: ScoringConfig, hasher: KeyHasher, default_region: str | None = None
    ) -> None:
        self.config = config
        self.hasher = hasher
        self.default_region = default_region
        self.reader = FeatureReader(config)

    def key(self, kind: str, raw: str) -> tuple[str, bytes]:
        """(kind, keyed digest) of a raw value; `UnknownKindError` or `NoKeyError` if none."""
        if kind not in self.config.kinds:
            raise UnknownKindError(f"unknown kind; use one of {', '.join(self.config.kinds)}")
        return kind, self.hasher.digest(kind, canonical_key(kind, raw, self.default_region))

    def statistics(
        self, kind: str, digest: bytes, profile: Profile, now_s: float
    ) -> dict[str, object]:
        """Plain statistics of one profile, read at ``now_s`` (or its last event, if later)."""
        cfg = self.config
        t = max(now_s, float(profile.last_s or now_s))
        first = profile.first_s
        return {
            "kind": kind,
            "key": digest.hex(),
            "as_of": _iso(t),
            "first_seen": None if first is None else _iso(first),
            "last_seen": None if profile.last_s is None else _iso(profile.last_s),
            "age_days": None if first is None else round((t - first) / 86400.0, 6),
            "events": {
                horizon_label(h): round(profile.count(j, t, cfg), 6)
                for j, h in enumerate(cfg.half_lives_s)
            },
            "labels": self._labels(kind, digest, profile, t),
            "fanout": self._fanout(kind, profile, t),
        }

    def _labels(self, kind: str, digest: bytes, profile: Profile, t: float) -> dict[str, object]:
        cfg = self.config
        h = cfg.label_half_life_s
        out: dict[str, object] = {
            "half_life": horizon_label(h),
            "fraud": round(decayed_value(profile.bad, t, h), 6),
            "legitimate": round(decayed_value(profile.good, t, h), 6),
            "bad_rate": None,
            "base_rate": cfg.base_rate,
        }
        if kind in cfg.label_kinds:
            basis = TimeBasis.at(t, cfg)
            x = self.reader.read(basis, [(kind, digest)], [profile], "login", None, frozenset())
            logit = x[self.reader.layout.index(f"{kind}.bad")] + cfg.base_logit
            out["bad_rate"] = round(sigmoid(logit), 6)
        return out

    def _fanout(self, kind: str, profile: Profile, t: float) -> dict[str, dict[str, float]]:
        cfg = self.config
        m = cfg.fanout_buckets
        out: dict[str, dict[str, float]] = {}
        for target in cfg.targets_of(kind):
            sketch = RecentDistinct.from_state(m, profile.fanout.get(KIND_LETTERS[target], {}))
            estimates = {horizon_label(w): sketch.get(t, w) for w in cfg.fanout_windows_s}
            row = {w: round(n, 3) for w, n in estimates.items()}
            for w, n in estimates.items():
                row[f"{w}_relative_error"] = round(standard_error(n, m), 3) if n > 0 else 0.0
            out[target] = row
        return out
