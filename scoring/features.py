"""The feature vector: statistics read off the profiles of an event's identifiers.

Features are read from the state as it was *before* the event. Their layout (names, order, and how
each is quantised for the learning log) follows from the `ScoringConfig`, so configuration changes
the features without code changes. All features are small numbers on comparable scales (log counts,
log ages, log-odds), which keeps the online model well conditioned.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from scoring.config import KIND_LETTERS, ScoringConfig
from scoring.decay import EPOCH_HALF_LIVES
from scoring.fanout import linear_count
from scoring.profile import Profile, TimeBasis

EVENT_TYPES = ("signup", "login", "checkout")
FLAGS = (
    "ip_invalid",
    "ip_special",
    "ip_v6",
    "phone_invalid",
    "phone_voip",
    "phone_no_country",
    "email_invalid",
    "email_disposable",
    "email_subaddress",
)
LOG, BINARY, SIGNED = "log", "binary", "signed"


def horizon_label(seconds: float) -> str:
    """Short label for a duration: ``1h``, ``1d``, ``30d``, ``90m``.

    >>> horizon_label(3600), horizon_label(86400), horizon_label(2592000), horizon_label(5400)
    ('1h', '1d', '30d', '90m')
    """
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60)):
        if seconds >= size and seconds % size == 0:
            return f"{int(seconds // size)}{unit}"
    return f"{int(seconds)}s"


@dataclass(frozen=True)
class FeatureLayout:
    """Names, order and quantiser of every feature for one configuration.

    >>> layout = FeatureLayout.of(ScoringConfig())
    >>> layout.names[:4]
    ('account.n_1h', 'account.n_1d', 'account.n_30d', 'account.age_d')
    >>> len(layout.names)
    87
    """

    names: tuple[str, ...]
    scales: tuple[str, ...]

    @classmethod
    def of(cls, config: ScoringConfig) -> FeatureLayout:
        names: list[str] = []
        scales: list[str] = []

        def add(name: str, scale: str) -> None:
            names.append(name)
            scales.append(scale)

        for kind in config.kinds:
            for h in config.half_lives_s:
                add(f"{kind}.n_{horizon_label(h)}", LOG)
            add(f"{kind}.age_d", LOG)
            add(f"{kind}.new", BINARY)
            if kind in config.label_kinds:
                add(f"{kind}.bad", SIGNED)
        short, long_ = (horizon_label(w) for w in config.fanout_windows_s)
        for kind, target in config.fanout:
            add(f"{kind}.{target}s_{short}", LOG)
            add(f"{kind}.{target}s_{long_}", LOG)
            add(f"{kind}.{target}_unseen", BINARY)
        for event_type in EVENT_TYPES:
            add(f"type.{event_type}", BINARY)
        add("amount.log", LOG)
        add("amount.vs_usual", SIGNED)
        for flag in FLAGS:
            add(f"flag.{flag}", BINARY)
        return cls(tuple(names), tuple(scales))

    def index(self, name: str) -> int:
        return self.names.index(name)


class FeatureReader:
    """Reads the feature vector of an event from its identifiers' profiles.

    Parameters
    ----------
    config
        The scoring configuration (kinds, half-lives, fan-out pairs).

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> reader = FeatureReader(cfg)
    >>> basis = TimeBasis.at(1_000_000.0, cfg)
    >>> x = reader.read(basis, [("device", b"d" * 8)], [None], "signup", None, frozenset())
    >>> x[reader.layout.index("device.new")], x[reader.layout.index("type.signup")]
    (1.0, 1.0)
    """

    def __init__(self, config: ScoringConfig) -> None:
        self.config = config
        self.layout = FeatureLayout.of(config)
        self._kind_offset: dict[str, int] = {}
        self._labelled: dict[str, bool] = {}
        offset = 0
        for kind in config.kinds:
            self._kind_offset[kind] = offset
            self._labelled[kind] = kind in config.label_kinds
            offset += len(config.half_lives_s) + (3 if self._labelled[kind] else 2)
        self._pairs = [
            (kind, target, KIND_LETTERS[target], offset + 3 * i)
            for i, (kind, target) in enumerate(config.fanout)
        ]
        self._event_offset = offset + 3 * len(config.fanout)
        self._size = len(self.layout.names)
        self._n_counts = len(config.half_lives_s)
        self._exposure_index = config.exposure_index
        self._censored_age_s = config.censored_age_s
        self._censor_before = -math.inf
        self._base_logit = config.base_logit
        self._alpha = config.prior_alpha
        self._alpha_beta = config.prior_alpha + config.prior_beta
        self._short_window_s, self._long_window_s = config.fanout_windows_s
        m = config.fanout_buckets
        self._log_counts = [math.log1p(linear_count(k, m)) for k in range(m + 1)]
        self._type_index = {t: i for i, t in enumerate(EVENT_TYPES)}
        first_flag = self._event_offset + len(EVENT_TYPES) + 2
        self._flag_slots = [(first_flag + i, f) for i, f in enumerate(FLAGS)]

    def read(
        self,
        basis: TimeBasis,
        identifiers: Sequence[tuple[str, bytes]],
        profiles: Sequence[Profile | None],
        event_type: str,
        amount: float | None,
        flags: frozenset[str],
        observed_since_s: float | None = None,
    ) -> list[float]:
        """Feature vector (in `FeatureLayout` order) of an event, from state before it.

        ``observed_since_s`` is when the store began observing: identifiers first seen within
        ``warmup_s`` of it are at least ``censored_age_s`` old as far as the features go, since
        their real age is unknown (without this, every popular domain and network looks brand
        new on the first days of a deployment).
        """
        x = [0.0] * self._size
        self._censor_before = (
            -math.inf if observed_since_s is None else observed_since_s + self.config.warmup_s
        )
        by_kind: dict[str, tuple[bytes, Profile | None]] = {}
        kind_offset = self._kind_offset
        for (kind, digest), profile in zip(identifiers, profiles, strict=True):
            by_kind[kind] = (digest, profile)
            offset = kind_offset.get(kind)
            if offset is not None:
                self._kind_features(x, offset, basis, profile, self._labelled[kind])
        for kind, target, letter, offset in self._pairs:
            own = by_kind.get(kind)
            if own is not None and own[1] is not None:
                self._fanout_features(x, offset, basis.t_s, own[1], letter, by_kind.get(target))
        self._event_features(x, basis, by_kind, event_type, amount, flags)
        return x

    def _kind_features(
        self,
        x: list[float],
        offset: int,
        basis: TimeBasis,
        profile: Profile | None,
        labelled: bool,
    ) -> None:
        n = self._n_counts
        if profile is None or profile.first_s is None:
            x[offset + n + 1] = 1.0  # never seen (its bad-rate feature stays 0: the base rate)
            return
        log1p = math.log1p
        exposure = 0.0
        for j, (sums, epoch, factor) in enumerate(
            zip(profile.counts, basis.epochs, basis.factors, strict=True)
        ):
            c = _read_sums(sums, epoch, factor)
            if j == self._exposure_index:
                exposure = c
            x[offset + j] = log1p(c) if c > 0.0 else 0.0
        age_s = basis.t_s - profile.first_s
        if profile.first_s < self._censor_before and age_s < self._censored_age_s:
            age_s = self._censored_age_s
        x[offset + n] = log1p(age_s / 86400.0) if age_s > 0 else 0.0
        if not labelled:
            return
        bad = _read_sums(profile.bad, basis.label_epoch, basis.label_factor) if profile.bad else 0.0
        if bad < 0.0:
            bad = 0.0
        rate = min((self._alpha + bad) / (self._alpha_beta + max(exposure, bad)), 0.999)
        x[offset + n + 2] = math.log(rate / (1.0 - rate)) - self._base_logit

    def _fanout_features(
        self,
        x: list[float],
        offset: int,
        t_s: float,
        profile: Profile,
        letter: str,
        other: tuple[bytes, Profile | None] | None,
    ) -> None:
        buckets = profile.fanout.get(letter)
        if buckets:
            long_since = t_s - self._long_window_s
            short_since = t_s - self._short_window_s
            occ_short = occ_long = 0
            for last in buckets.values():
                if last > long_since:
                    occ_long += 1
                    if last > short_since:
                        occ_short += 1
            table = self._log_counts
            x[offset] = table[occ_short]
            x[offset + 1] = table[occ_long]
        if other is not None and profile.first_s is not None:
            own = buckets.get(self._bucket(other[0])) if buckets else None
            if own is None or own <= t_s - self._long_window_s:
                x[offset + 2] = 1.0

    def _bucket(self, digest: bytes) -> int:
        return bucket_of(digest, self.config.fanout_buckets)

    def _event_features(
        self,
        x: list[float],
        basis: TimeBasis,
        by_kind: dict[str, tuple[bytes, Profile | None]],
        event_type: str,
        amount: float | None,
        flags: frozenset[str],
    ) -> None:
        o = self._event_offset
        type_index = self._type_index.get(event_type)
        if type_index is not None:
            x[o + type_index] = 1.0
        if amount is not None and amount > 0:
            x[o + 3] = math.log1p(amount)
            x[o + 4] = self._amount_vs_usual(basis, by_kind, amount)
        if flags:
            for i, flag in self._flag_slots:
                if flag in flags:
                    x[i] = 1.0

    def _amount_vs_usual(
        self, basis: TimeBasis, by_kind: dict[str, tuple[bytes, Profile | None]], amount: float
    ) -> float:
        entry = by_kind.get(self.config.amount_kind)
        if entry is None or entry[1] is None or not entry[1].amount:
            return 0.0
        profile = entry[1]
        last = len(basis.epochs) - 1
        spent = _read_sums(profile.amount, basis.epochs[last], basis.factors[last])
        events = _read_sums(profile.counts[last], basis.epochs[last], basis.factors[last])
        if events <= 0.0 or spent <= 0.0:
            return 0.0
        return math.log((amount + 1.0) / (spent / events + 1.0))


def bucket_of(digest: bytes, buckets: int) -> int:
    """Fan-out bucket of an identifier digest (its last four bytes, modulo ``buckets``).

    >>> bucket_of(bytes(range(8)), 32)
    7
    """
    return int.from_bytes(digest[4:8], "big") % buckets


def _read_sums(sums: dict[int, float], epoch: int, factor: float) -> float:
    """Forward-decay sums read at the time whose epoch and factor are given."""
    total = 0.0
    for e, value in sums.items():
        if e == epoch:
            total += value / factor
        else:
            shift = (epoch - e) * EPOCH_HALF_LIVES
            if shift < 1024:
                total += value / factor * 2.0 ** (-shift)
    return total
