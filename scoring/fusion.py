"""Fusion: the prior and an online logistic model turned into risk, decision and reasons.

The learned part is river's `LogisticRegression` behind river's `StandardScaler`, trained one
label at a time on the features that were logged when the event was scored, with the prior's
points as one more feature (so the model learns how far to trust the prior, and corrects it).
Confirmed-legitimate examples come from labels and from events that stayed unlabelled for a
maturity period; the latter are sampled at a rate ``r``, and the model's log-odds are shifted by
``log(r)`` to undo the sampling (prior correction for case-control sampling: King and Zeng,
"Logistic Regression in Rare Events Data", Political Analysis 9(2), 2001).

While few fraud labels have been learned the risk leans on the prior: the final log-odds are
``(1 - a) * prior + a * model`` with ``a = min(1, fraud labels learned / takeover_labels)``.

river documents only pickle for saving models, so the model is published as a `ModelSnapshot` of
plain numbers in msgpack; API workers predict from the snapshot without river, and a learner
restores river objects from it and carries on learning exactly where it stopped.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Sequence
from dataclasses import dataclass

import msgpack
import numpy as np
from river import linear_model, optim, preprocessing

from scoring.config import ScoringConfig
from scoring.features import FeatureLayout
from scoring.prior import Evidence, Prior
from scoring.reasons import describe

PRIOR_FEATURE = "prior.points"
SNAPSHOT_FORMAT = 1
DECISIONS = ("allow", "review", "deny")


class SnapshotError(ValueError):
    """A model snapshot that cannot be used here, with the reason."""


@dataclass(frozen=True)
class Assessment:
    """Risk (probability of fraud), decision and reasons of one event."""

    risk: float
    decision: str
    reasons: tuple[str, ...]
    codes: tuple[str, ...]
    values: tuple[float, ...]
    prior_logit: float
    model_version: int


def sigmoid(z: float) -> float:
    """Logistic function, safe for large arguments.

    >>> sigmoid(0.0), round(sigmoid(50.0), 6), sigmoid(-800.0)
    (0.5, 1.0, 0.0)
    """
    if z >= 0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z) if z > -700 else 0.0
    return e / (1.0 + e)


def sigmoid_array(z: np.ndarray) -> np.ndarray:
    """`sigmoid` of every element (same formula, numpy's exp).

    >>> sigmoid_array(np.array([0.0, -800.0])).tolist()
    [0.5, 0.0]
    """
    with np.errstate(over="ignore"):
        # the exponent is kept <= 0: e^z of a large positive z would be inf, and inf / inf
        # a NaN (with a warning) in the branch that np.where then discards
        e = np.exp(np.where(z > -700, np.minimum(z, 0.0), -700.0))
        pos = 1.0 / (1.0 + np.exp(-np.maximum(z, 0.0)))
        neg = np.where(z > -700, e / (1.0 + e), 0.0)
    return np.where(z >= 0, pos, neg)


@dataclass(frozen=True)
class ModelSnapshot:
    """Plain-number state of the online model: enough to predict, and to resume learning.

    ``features`` are the model inputs in order (the layout's names, then `PRIOR_FEATURE`).

    Examples
    --------
    >>> snap = ModelSnapshot.empty(("a", "b"))
    >>> ModelSnapshot.from_bytes(snap.to_bytes()) == snap
    True
    >>> snap.logit([1.0, 2.0])
    0.0
    """

    version: int
    features: tuple[str, ...]
    counts: tuple[float, ...]
    means: tuple[float, ...]
    variances: tuple[float, ...]
    weights: tuple[float, ...]
    intercept: float
    positives: int
    negatives: int

    @classmethod
    def empty(cls, features: Sequence[str]) -> ModelSnapshot:
        zeros = (0.0,) * len(features)
        return cls(0, tuple(features), zeros, zeros, zeros, zeros, 0.0, 0, 0)

    def logit(self, z_inputs: Sequence[float]) -> float:
        """Model log-odds (before the sampling correction) for inputs in `features` order."""
        x = np.asarray(z_inputs, dtype=np.float64)
        return float(self._scaled(x) @ self._weights_array) + self.intercept

    def contributions(self, inputs: Sequence[float]) -> np.ndarray:
        """Per-input log-odds contributions ``w_i * (x_i - mean_i) / std_i``."""
        out: np.ndarray = self._scaled(np.asarray(inputs, dtype=np.float64)) * self._weights_array
        return out

    def _scaled(self, x: np.ndarray) -> np.ndarray:
        out: np.ndarray = (x - self._means_array) * self._inv_std_array
        return out

    @property
    def _means_array(self) -> np.ndarray:
        return _cached_array(self, "means")

    @property
    def _weights_array(self) -> np.ndarray:
        return _cached_array(self, "weights")

    @property
    def _inv_std_array(self) -> np.ndarray:
        cached: np.ndarray | None = self.__dict__.get("_inv_std")
        if cached is None:
            cached = inverse_std(np.asarray(self.variances, dtype=np.float64))
            object.__setattr__(self, "_inv_std", cached)
        return cached

    def to_bytes(self) -> bytes:
        """msgpack of plain numbers (nothing executable is ever unpickled)."""
        payload = {
            "format": SNAPSHOT_FORMAT,
            "version": self.version,
            "features": list(self.features),
            "counts": list(self.counts),
            "means": list(self.means),
            "variances": list(self.variances),
            "weights": list(self.weights),
            "intercept": self.intercept,
            "positives": self.positives,
            "negatives": self.negatives,
        }
        return bytes(msgpack.packb(payload, use_bin_type=True))

    @classmethod
    def from_bytes(cls, data: bytes) -> ModelSnapshot:
        """Parse `to_bytes` output; raises `SnapshotError` on anything else."""
        try:
            raw = msgpack.unpackb(data, raw=False, strict_map_key=False)
            if not isinstance(raw, dict):
                raise SnapshotError(f"not a model snapshot: a {type(raw).__name__}, not a map")
            if raw.get("format") != SNAPSHOT_FORMAT:
                raise SnapshotError(f"unknown snapshot format {raw.get('format')!r}")
            n = len(raw["features"])
            counts, means, variances, weights = (tuple(float(v) for v in raw[k]) for k in _VECTORS)
            if any(len(v) != n for v in (counts, means, variances, weights)):
                raise SnapshotError("snapshot vectors differ in length from its feature list")
            return cls(
                int(raw["version"]),
                tuple(str(f) for f in raw["features"]),
                counts,
                means,
                variances,
                weights,
                float(raw["intercept"]),
                int(raw["positives"]),
                int(raw["negatives"]),
            )
        except (KeyError, OverflowError, TypeError, ValueError, msgpack.ExtraData) as exc:
            if isinstance(exc, SnapshotError):
                raise
            raise SnapshotError(f"not a model snapshot: {exc}") from exc


_VECTORS = ("counts", "means", "variances", "weights")


def inverse_std(variances: np.ndarray) -> np.ndarray:
    """``1 / sqrt(var)``, and 0 where the variance is 0 (river's scaler maps such inputs to 0)."""
    safe = np.where(variances > 0.0, variances, 1.0)
    return np.where(variances > 0.0, 1.0 / np.sqrt(safe), 0.0)


def blend_of(config: ScoringConfig, positives: int, negatives: int) -> float:
    """Share of the model in the final log-odds, given what it has learned."""
    return min(
        1.0,
        positives / max(config.takeover_labels, 1),
        negatives / max(config.takeover_negatives, 1),
    )


def _cached_array(snapshot: ModelSnapshot, name: str) -> np.ndarray:
    key = f"_cache_{name}"
    cached: np.ndarray | None = snapshot.__dict__.get(key)
    if cached is None:
        cached = np.asarray(getattr(snapshot, name), dtype=np.float64)
        object.__setattr__(snapshot, key, cached)
    return cached


class OnlineModel:
    """River's scaler and logistic regression, learning one label at a time.

    Examples
    --------
    >>> m = OnlineModel(("a", "b"), learning_rate=0.1)
    >>> for _ in range(50):
    ...     m.learn_one([1.0, 0.0], True)
    ...     m.learn_one([0.0, 1.0], False)
    >>> snap = m.snapshot()
    >>> snap.logit([1.0, 0.0]) > 0 > snap.logit([0.0, 1.0])
    True
    >>> abs(snap.logit([1.0, 0.0]) - m.raw_logit([1.0, 0.0])) < 1e-12
    True
    """

    def __init__(
        self, features: Sequence[str], learning_rate: float = 0.02, l2: float = 1e-4
    ) -> None:
        self.features = tuple(features)
        self.scaler = preprocessing.StandardScaler()
        self.regression = linear_model.LogisticRegression(
            optimizer=optim.SGD(learning_rate), l2=l2, intercept_lr=learning_rate
        )
        self.version = 0
        self.positives = 0
        self.negatives = 0
        self._pick = operator.itemgetter(*self.features)
        self._zeros = [0.0] * len(self.features)

    def learn_one(self, inputs: Sequence[float], is_fraud: bool) -> None:
        """Learn one example (inputs in `features` order)."""
        x = dict(zip(self.features, inputs, strict=True))
        self.scaler.learn_one(x)
        self.regression.learn_one(self.scaler.transform_one(x), bool(is_fraud))
        if is_fraud:
            self.positives += 1
        else:
            self.negatives += 1

    def raw_logit(self, inputs: Sequence[float]) -> float:
        """Log-odds straight from river (the reference the snapshot must match)."""
        x = self.scaler.transform_one(dict(zip(self.features, inputs, strict=True)))
        return float(self.regression._raw_dot_one(x))

    def snapshot(self) -> ModelSnapshot:
        """Publish the current state as a new version."""
        self.version += 1
        weights = self.regression._weights
        return ModelSnapshot(
            self.version,
            self.features,
            tuple(float(self.scaler.counts[f]) for f in self.features),
            tuple(float(self.scaler.means[f]) for f in self.features),
            tuple(float(self.scaler.vars[f]) for f in self.features),
            tuple(float(weights.get(f, 0.0)) for f in self.features),
            float(self.regression.intercept),
            self.positives,
            self.negatives,
        )

    def publish_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
        """Publish a new version as arrays (means, variances, weights) and the intercept.

        The same numbers as `snapshot`, without building a snapshot object: the batch path
        publishes as often as the per-event learner does and needs only these.
        """
        self.version += 1
        weights = self.regression._weights
        means = np.array(self._pick(self.scaler.means), dtype=np.float64)
        variances = np.array(self._pick(self.scaler.vars), dtype=np.float64)
        w = np.fromiter(
            map(weights.get, self.features, self._zeros), np.float64, len(self.features)
        )
        return means, variances, w, float(self.regression.intercept)

    @classmethod
    def restore(
        cls, snapshot: ModelSnapshot, learning_rate: float = 0.02, l2: float = 1e-4
    ) -> OnlineModel:
        """River objects rebuilt from a snapshot; they predict and learn as the originals."""
        model = cls(snapshot.features, learning_rate, l2)
        for i, f in enumerate(snapshot.features):
            if snapshot.counts[i]:
                model.scaler.counts[f] = int(snapshot.counts[i])
                model.scaler.means[f] = snapshot.means[i]
                model.scaler.vars[f] = snapshot.variances[i]
            if snapshot.weights[i]:
                model.regression._weights[f] = snapshot.weights[i]
        model.regression.intercept = snapshot.intercept
        model.version = snapshot.version
        model.positives = snapshot.positives
        model.negatives = snapshot.negatives
        return model


def model_features(layout: FeatureLayout) -> tuple[str, ...]:
    """Model inputs: every feature of the layout, then the prior's points."""
    return (*layout.names, PRIOR_FEATURE)


def _group(code: str) -> str:
    head, _, stat = code.partition(".")
    stat = stat.rsplit("_", 1)[0] if stat.rsplit("_", 1)[-1][:1].isdigit() else stat
    return f"{head}.{stat}"


class Fusion:
    """Prior plus published model snapshot → `Assessment`.

    Examples
    --------
    >>> cfg = ScoringConfig()
    >>> fusion = Fusion(cfg)
    >>> x = [0.0] * len(fusion.layout.names)
    >>> a = fusion.assess(x)
    >>> round(a.risk, 4), a.decision, a.reasons
    (0.01, 'allow', ())
    >>> x[fusion.layout.index("flag.email_disposable")] = 1.0
    >>> fusion.assess(x).reasons
    ('e-mail domain: on the disposable-address list',)
    """

    def __init__(self, config: ScoringConfig, snapshot: ModelSnapshot | None = None) -> None:
        self.config = config
        self.layout = FeatureLayout.of(config)
        self.prior = Prior(config)
        self.inputs = model_features(self.layout)
        self._codes = [_group(n) for n in self.layout.names]
        self._binary = [s == "binary" for s in self.layout.scales]
        self._explains_array = np.array([not n.startswith("type.") for n in self.layout.names])
        self._age_array = np.array([n.endswith(".age_d") for n in self.layout.names])
        self._sample_shift = math.log(config.negative_sample_rate)
        self.snapshot = snapshot or ModelSnapshot.empty(self.inputs)
        self.use(self.snapshot)

    def use(self, snapshot: ModelSnapshot) -> None:
        """Switch to a newly published snapshot (inputs must match this layout)."""
        if snapshot.features != self.inputs:
            raise SnapshotError(
                "snapshot was learned on other features than this configuration produces; "
                "start a new model or restore the configuration it was learned with"
            )
        self.snapshot = snapshot
        self._blend = blend_of(self.config, snapshot.positives, snapshot.negatives)

    def decide(self, risk: float) -> str:
        """allow / review / deny from the configured thresholds."""
        if risk >= self.config.deny_at:
            return "deny"
        return "review" if risk >= self.config.review_at else "allow"

    def assess(self, x: Sequence[float], *, prior_only: bool = False) -> Assessment:
        """Risk, decision and reasons for a feature vector (state before the event).

        ``prior_only`` ignores the learned model (used when the state could not be read, since
        the model was learned on features that had their state).
        """
        evidence = self.prior.evidence(x)
        points = sum(e.points for e in evidence)
        prior_logit = self.config.base_logit + points
        a = 0.0 if prior_only else self._blend
        logit = prior_logit
        contributions = None
        if a > 0.0:
            contributions = self.snapshot.contributions([*x, points])
            model_logit = float(contributions.sum()) + self.snapshot.intercept + self._sample_shift
            logit = (1.0 - a) * prior_logit + a * model_logit
        risk = sigmoid(logit)
        top: list[tuple[str, float]] = []
        if risk >= self.config.reason_floor_risk:
            top = self._reasons(x, evidence, contributions, a)
        return Assessment(
            risk,
            self.decide(risk),
            tuple(describe(code, value) for code, value in top),
            tuple(code for code, _ in top),
            tuple(value for _, value in top),
            prior_logit,
            self.snapshot.version,
        )

    def _reasons(
        self,
        x: Sequence[float],
        evidence: list[Evidence],
        contributions: np.ndarray | None,
        a: float,
    ) -> list[tuple[str, float]]:
        members: list[tuple[str, str, float, float]] = []
        prior_weight = 1.0
        if contributions is not None:
            prior_weight = (1.0 - a) + a * self.prior_slope()
            members.extend(self._model_members(x, contributions, a))
        order = {code: i for i, code in enumerate(self.prior.codes)}
        for e in sorted(evidence, key=lambda e: order[e.code]):
            members.append((_group(e.code), e.code, e.points * prior_weight, e.value))
        return choose_reasons(members, self.config.reasons)

    def prior_slope(self) -> float:
        """Log-odds the model gives per point of the prior (its weight on the prior feature)."""
        return self.snapshot.weights[-1] * float(self.snapshot._inv_std_array[-1])

    def reason_eligible(self, weights: np.ndarray | None = None) -> np.ndarray:
        """Per feature: may it be quoted as a reason when its contribution raises the risk?

        A feature whose high values lower the risk is not quoted ("few events" reads poorly as
        a reason), except ages, where youth raising the risk is a reason in plain words.
        """
        w = self.snapshot._weights_array if weights is None else weights
        out: np.ndarray = self._explains_array & (
            (w[: len(self.layout.names)] >= 0) | self._age_array
        )
        return out

    def reason_eligible_rows(self, weights: np.ndarray) -> np.ndarray:
        """`reason_eligible` for many model states at once (one row of weights each)."""
        nf = len(self.layout.names)
        out: np.ndarray = self._explains_array & ((weights[:, :nf] >= 0) | self._age_array)
        return out

    def _model_members(
        self, x: Sequence[float], contributions: np.ndarray, a: float
    ) -> list[tuple[str, str, float, float]]:
        names = self.layout.names
        eligible = self.reason_eligible()
        out = []
        for i in np.flatnonzero(contributions[:-1] * a > REASON_FLOOR):
            j = int(i)
            if eligible[j] and not (self._binary[j] and not x[j]):
                weight = a * float(contributions[j])
                out.append((self._codes[j], names[j], weight, _shown(names[j], x[j])))
        return out


REASON_FLOOR = 0.05
"""Smallest log-odds contribution worth quoting as a reason."""


def choose_reasons(
    members: Sequence[tuple[str, str, float, float]], k: int
) -> list[tuple[str, float]]:
    """The ``k`` strongest reasons from (group, code, weight, value) members.

    Weights add up within a group (several statistics of one thing count as one reason); the
    group is quoted through its strongest member. Ties go to the alphabetically first name, so
    the choice is deterministic.

    >>> choose_reasons([("a.x", "a.x_1d", 0.5, 3.0), ("a.x", "a.x_30d", 0.4, 9.0),
    ...                 ("b.y", "b.y", 0.7, 1.0)], 2)
    [('a.x_1d', 3.0), ('b.y', 1.0)]
    """
    groups: dict[str, list[float | str]] = {}
    for group, code, weight, value in members:
        held = groups.get(group)
        if held is None:
            groups[group] = [weight, code, value, weight]
            continue
        held[0] = float(held[0]) + weight
        if weight > float(held[3]) or (weight == held[3] and code < str(held[1])):
            held[1], held[2], held[3] = code, value, weight
    ranked = sorted(groups.items(), key=lambda item: (-float(item[1][0]), item[0]))
    return [
        (str(held[1]), float(held[2])) for _, held in ranked[:k] if float(held[0]) > REASON_FLOOR
    ]


def _shown(name: str, value: float) -> float:
    """The number a reason quotes for a feature value (counts and ages undo their log)."""
    if name.endswith((".bad",)) or name.startswith("flag."):
        return value
    if name == "amount.vs_usual":
        return math.exp(value)
    return math.expm1(value)
