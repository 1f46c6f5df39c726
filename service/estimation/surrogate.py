"""Loss-predicting surrogate: expected loss g and residual second moment E[(L - g)^2].

Cold start (version 0, no labels; regression keeps it below MIN_REGRESSION_LABELS labels):
- classification: the model's own predictive distribution pi = f, so
  g = sum_y f(y) loss(f, y) and E[L^2] likewise;
- regression: the model's outputs carry no spread, so a constant prior from the cap:
  g = cap / 2 and E[(L - g)^2] = cap^2 / 4 (the largest variance of a variable in
  [0, cap], Popoviciu's inequality), deliberately pessimistic until labels arrive.

With labels (``fit_surrogate``): LightGBM boosting that starts from the model's own output
(``init_score``) and learns corrections, strongly regularised for tiny label sets, fitted
``ensemble_size`` times on bootstrap resamples for an epistemic spread:
- classification: a temperature T fitted to the labels (penalised towards 1), then
  multiclass boosting with init_score = log softmax(log(clipped f) / T); the ensemble's
  mean class probabilities give g and E[L^2]. Classes never seen among the labels keep the
  start probability (the model's own, temperature-scaled; the seen classes share the rest),
  so a class absent from a tiny label set is not pushed towards zero.
- regression: one booster for the target mean (init_score = f) and one for the deployed
  model's raw squared error (y - f)^2; the error d = y - f is modelled as Gaussian with
  mean mu - f and variance max((y - f)^2-fit - (mu - f)^2, 10% of the fit), and the clipped
  loss moments follow in closed form (``LossSpec.expected_losses``).
E[(L - g)^2] = mean over members of (E[L^2] - g^2) + variance over members of g.

Validation rows (``ValidationRows``): labeled rows from outside the pool (the team's
validation split, or out-of-fold outputs on its training data) join the pool labels in
the temperature fit and in every member's training set. They do not depend on the draws,
so a surrogate fitted on them is as predictable as the cold start (docs/estimation.md).
Pool labels describe the pool and come to dominate as they accrue: a pool label weighs 1
and the validation rows share a fixed total weight, ``validation_weight`` (3,000) in the
trees and ``temperature_validation_weight`` (100) in the temperature, so the temperature
follows the pool labels from about a hundred of them on and the trees from a few
thousand (benchmarks/experiments/NOTES.md, "Validation rows", has the measurements).
At most ``max_validation_rows`` of them are used (a seeded subsample beyond).

Refit cost is bounded: at most ``max_training_rows`` labels and ``max_validation_rows``
validation rows (seeded subsamples beyond),
``num_rounds`` rounds of ``num_leaves`` leaves per member (times K classes), and
``ensemble_size`` members; scoring costs ensemble_size x num_rounds (x K) tree walks per
item. Everything is deterministic given ``seed`` (LightGBM runs with
``deterministic=True`` on ``num_threads`` threads).

Persistence: ``to_bytes`` writes a JSON envelope holding each booster's
``model_to_string`` text; no pickle.
"""

from __future__ import annotations

import json
import logging
import threading
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np

from ._checks import check_finite_array, describe
from .losses import CROSS_ENTROPY_CLIP, LossKind, LossSpec, loss_reach

# LightGBM's native code is called one call at a time in this process. A server scores
# ingest batches on request threads while a background refit trains: a full test run once
# died with a segmentation fault in a native thread while a Dataset was being built on one
# thread and a Booster predicted on another. Holding this lock per call (never across a
# whole pool: callers score in chunks) costs little on two cores and removes the overlap.
_NATIVE_CALLS = threading.Lock()

__all__ = [
    "Surrogate",
    "SurrogateScores",
    "MIN_REGRESSION_LABELS",
    "SurrogateSettings",
    "ValidationRows",
    "cold_start_surrogate",
    "concatenate_scores",
    "worst_squared_deviation",
    "worst_squared_deviation_of",
    "fit_surrogate",
]

_LOG = logging.getLogger(__name__)
_FORMAT = "leadline-surrogate"
_FORMAT_VERSION = 1
# Rounds without improvement on the hold-out before boosting stops (common practice, no
# source; docs/estimation.md §2).
_EARLY_STOPPING_PATIENCE = 5
_REGRESSION_SPREAD_FLOOR = 0.1  # share of the squared-error fit kept as variance

#: Regression pools keep the cold start until this many labels exist (our choice: the
#: squared-error booster needs a few residuals per leaf before its spread means anything).
MIN_REGRESSION_LABELS: int = 10


@dataclass(frozen=True)
class SurrogateScores:
    """Per-item surrogate predictions, each (n,).

    ``worst_squared_deviation`` is max over the losses the item can take of (L - g)^2:
    from the item's own loss table (classification: the loss of its prediction under each
    possible label) or, for regression, max(g, B - g)^2. The hedged usefulness uses it;
    None means "not computed" and the hedge falls back to the loss-bound form.
    """

    expected_loss: np.ndarray
    residual_second_moment: np.ndarray
    spread: np.ndarray
    worst_squared_deviation: np.ndarray | None = None


@dataclass(frozen=True, kw_only=True)
class SurrogateSettings:
    """Capacity and cost limits of a surrogate fit (defaults tuned for tiny label sets)."""

    ensemble_size: int = 5
    # Shallow trees, more rounds: on digits (10 classes, 50-400 labels) 3 leaves x 60
    # rounds at rate 0.2 predicted held-out losses 5-10% better than 7 x 40 at 0.1.
    num_leaves: int = 3
    min_data_in_leaf: int = 3
    num_rounds: int = 60
    learning_rate: float = 0.2
    lambda_l2: float = 5.0
    max_bin: int = 63
    max_training_rows: int = 20_000
    #: With at least this many labels a 20% hold-out picks the number of rounds (boosting
    #: stops after ``_EARLY_STOPPING_PATIENCE`` rounds without improvement on it).
    early_stopping_min_labels: int = 200
    num_threads: int = 1
    # -- validation rows (used only when a fit is given ``ValidationRows``) --------------
    #: At most this many validation rows per fit (a seeded subsample beyond).
    max_validation_rows: int = 5_000
    #: Total weight the validation rows share in the trees (each row min(1, this / rows
    #: used); a pool label weighs 1): pool labels outweigh them beyond this many.
    #: ``math.inf`` gives every validation row the weight of a pool label.
    validation_weight: float = 3000.0
    #: The same for the temperature fit: pool labels set the temperature from about this
    #: many on, the validation rows before.
    temperature_validation_weight: float = 100.0

    def __post_init__(self) -> None:
        for name in (
            "ensemble_size",
            "num_leaves",
            "min_data_in_leaf",
            "num_rounds",
            "max_bin",
            "max_training_rows",
            "num_threads",
            "max_validation_rows",
        ):
            value = getattr(self, name)
            if not isinstance(value, int) or value < 1:
                raise ValueError(f"{name} = {describe(value)}: must be an integer >= 1.")
        if self.num_leaves < 2:
            raise ValueError(f"num_leaves = {describe(self.num_leaves)}: must be >= 2.")
        if self.num_threads > 2:
            raise ValueError(f"num_threads = {describe(self.num_threads)}: must be 1 or 2.")
        if not (0.0 < self.learning_rate <= 1.0):
            raise ValueError(f"learning_rate = {describe(self.learning_rate)}: must be in (0, 1].")
        if not (self.lambda_l2 >= 0.0):
            raise ValueError(f"lambda_l2 = {describe(self.lambda_l2)}: must be >= 0.")
        for name in ("validation_weight", "temperature_validation_weight"):
            value = getattr(self, name)
            if not (value > 0.0):
                raise ValueError(
                    f"{name} = {describe(value)}: must be > 0 (math.inf: every validation "
                    "row weighs as much as a pool label)."
                )


@dataclass(frozen=True)
class ValidationRows:
    """Labeled rows from outside the pool that teach the surrogate: the team's validation
    split, or out-of-fold outputs on its training data.

    ``features`` (n, d) as the pool's; ``outputs`` the model's held-out outputs for these
    rows ((n, K) probabilities or (n,) predictions); ``labels`` (n,) class indices or real
    targets. Their outputs must be held-out ones (the model did not train on the row), or
    the surrogate learns the model's training-set confidence. They never enter an
    estimate: only the surrogate sees them.
    """

    features: np.ndarray
    outputs: np.ndarray
    labels: np.ndarray

    def __len__(self) -> int:
        return int(np.shape(self.labels)[0])


class Surrogate:
    """A fitted, immutable surrogate. Build with ``cold_start_surrogate`` or
    ``fit_surrogate``; ``version`` 0 is the cold start.

    What it was fitted on: ``label_count`` pool labels and ``validation_count`` validation
    rows given (``validation_used`` of them after the cap).
    """

    def __init__(
        self,
        spec: LossSpec,
        *,
        version: int,
        label_count: int,
        boosters: tuple[lgb.Booster, ...] = (),
        variance_boosters: tuple[lgb.Booster, ...] = (),
        seen_classes: tuple[int, ...] = (),
        feature_dim: int = -1,
        temperature: float = 1.0,
        validation_count: int = 0,
        validation_used: int = 0,
    ) -> None:
        self.spec = spec
        self.version = int(version)
        self.label_count = int(label_count)
        self._boosters = boosters
        self._variance_boosters = variance_boosters
        self._seen_classes = seen_classes
        self._feature_dim = feature_dim
        self.temperature = float(temperature)
        self.validation_count = int(validation_count)
        self.validation_used = int(validation_used)

    def __repr__(self) -> str:
        return (
            f"Surrogate(version={self.version}, label_count={self.label_count}, "
            f"validation_count={self.validation_count}, "
            f"members={len(self._boosters)}, spec={describe(self.spec)})"
        )

    @property
    def is_cold_start(self) -> bool:
        return not self._boosters

    # ----------------------------------------------------------------------------------

    def score(self, features: np.ndarray, outputs: np.ndarray) -> SurrogateScores:
        """g, E[(L - g)^2] and the ensemble spread of g for every item."""
        out = self.spec.check_outputs(outputs)
        n = out.shape[0]
        if self.is_cold_start:
            return _cold_scores(self.spec, out)
        x = _design(features, out, self._feature_dim)
        if x.shape[0] != n:
            raise ValueError(f"features has {x.shape[0]} rows: must match outputs ({n}).")
        firsts, seconds = [], []
        # The boosting start is shared by every member: compute it once.
        init = _log_init(out, self.temperature) if self.spec.is_classification else None
        for index, booster in enumerate(self._boosters):
            if init is not None:
                pi = _class_probabilities(booster, x, out, self._seen_classes, init)
                first, second = self.spec.expected_losses(out, pi)
            else:
                with _NATIVE_CALLS:
                    mean = out + booster.predict(x)
                    raw_variance = self._variance_boosters[index].predict(x)
                raw = np.maximum(raw_variance, 0.0)
                variance = np.maximum(raw - (mean - out) ** 2, _REGRESSION_SPREAD_FLOOR * raw)
                first, second = self.spec.expected_losses(out, (mean, variance))
            firsts.append(first)
            seconds.append(second)
        first_stack = np.vstack(firsts)
        second_stack = np.vstack(seconds)
        g = first_stack.mean(axis=0)
        aleatoric = np.maximum(second_stack - first_stack**2, 0.0).mean(axis=0)
        epistemic = first_stack.var(axis=0)
        return SurrogateScores(
            expected_loss=g,
            residual_second_moment=aleatoric + epistemic,
            spread=np.sqrt(epistemic),
            worst_squared_deviation=worst_squared_deviation(self.spec, out, g),
        )

    def class_probabilities(self, features: np.ndarray, outputs: np.ndarray) -> np.ndarray:
        """Classification only: the ensemble's mean predictive class distribution (n, K)."""
        if not self.spec.is_classification:
            raise ValueError(f"spec = {self.spec!r}, class_probabilities needs classification.")
        out = self.spec.check_outputs(outputs)
        if self.is_cold_start:
            return out.copy()
        x = _design(features, out, self._feature_dim)
        init = _log_init(out, self.temperature)
        members = [
            _class_probabilities(b, x, out, self._seen_classes, init) for b in self._boosters
        ]
        return np.asarray(np.mean(members, axis=0))

    # ----------------------------------------------------------------------------------

    def to_bytes(self) -> bytes:
        """JSON envelope with LightGBM model text; read back with ``from_bytes``."""
        envelope = {
            "format": _FORMAT,
            "format_version": _FORMAT_VERSION,
            "loss_kind": self.spec.kind.value,
            "num_classes": self.spec.num_classes,
            "version": self.version,
            "label_count": self.label_count,
            "feature_dim": self._feature_dim,
            "seen_classes": list(self._seen_classes),
            "temperature": self.temperature,
            "validation_count": self.validation_count,
            "validation_used": self.validation_used,
            "boosters": [b.model_to_string() for b in self._boosters],
            "variance_boosters": [b.model_to_string() for b in self._variance_boosters],
        }
        return json.dumps(envelope).encode("utf-8")

    @classmethod
    def from_bytes(cls, spec: LossSpec, data: bytes) -> Surrogate:
        """Inverse of ``to_bytes``; ValueError if the bytes are not a surrogate for spec."""
        try:
            envelope = json.loads(bytes(data).decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as error:
            raise ValueError(f"data is not a surrogate envelope ({error}).") from None
        if not isinstance(envelope, dict) or envelope.get("format") != _FORMAT:
            raise ValueError("data format is not 'leadline-surrogate'.")
        if envelope.get("format_version") != _FORMAT_VERSION:
            raise ValueError(
                f"format_version = {describe(envelope.get('format_version'))}:"
                f" must be {_FORMAT_VERSION}."
            )
        if envelope["loss_kind"] != spec.kind.value or envelope["num_classes"] != spec.num_classes:
            raise ValueError(
                f"surrogate was fitted for loss {describe(envelope['loss_kind'])} with "
                f"{envelope['num_classes']} classes, spec is {describe(spec)}."
            )
        with _NATIVE_CALLS:
            boosters = tuple(lgb.Booster(model_str=s) for s in envelope["boosters"])
            variance_boosters = tuple(
                lgb.Booster(model_str=s) for s in envelope["variance_boosters"]
            )
        return cls(
            spec,
            version=envelope["version"],
            label_count=envelope["label_count"],
            boosters=boosters,
            variance_boosters=variance_boosters,
            seen_classes=tuple(int(c) for c in envelope["seen_classes"]),
            feature_dim=int(envelope["feature_dim"]),
            temperature=float(envelope["temperature"]),
            # Envelopes written before validation rows existed lack these keys.
            validation_count=int(envelope.get("validation_count", 0)),
            validation_used=int(envelope.get("validation_used", 0)),
        )


def cold_start_surrogate(spec: LossSpec) -> Surrogate:
    """Version 0: the model's own predictive distribution (regression: constant prior)."""
    return Surrogate(spec, version=0, label_count=0)


def _cold_scores(spec: LossSpec, outputs: np.ndarray) -> SurrogateScores:
    n = outputs.shape[0]
    if spec.is_classification:
        first, second = spec.expected_losses(outputs, outputs)
        residual = np.maximum(second - first**2, 0.0)
    else:
        first = np.full(n, spec.loss_cap / 2.0)
        residual = np.full(n, spec.loss_cap**2 / 4.0)
    return SurrogateScores(
        expected_loss=first,
        residual_second_moment=residual,
        spread=np.zeros(n),
        worst_squared_deviation=worst_squared_deviation(spec, outputs, first),
    )


def concatenate_scores(parts: list[SurrogateScores]) -> SurrogateScores:
    """Scores of consecutive row chunks joined into one (``worst_squared_deviation`` only
    if every part has it)."""
    worst = [p.worst_squared_deviation for p in parts]
    return SurrogateScores(
        expected_loss=np.concatenate([p.expected_loss for p in parts]),
        residual_second_moment=np.concatenate([p.residual_second_moment for p in parts]),
        spread=np.concatenate([p.spread for p in parts]),
        worst_squared_deviation=(
            None if any(w is None for w in worst) else np.concatenate(worst)  # type: ignore[arg-type]
        ),
    )


def worst_squared_deviation(
    spec: LossSpec, outputs: np.ndarray, expected: np.ndarray
) -> np.ndarray:
    """max over the losses each item can take of (L - g)^2, (n,).

    Classification: over the item's loss-table row (its prediction's loss under each
    label), so an overconfident prediction's costly mistake counts at its own size.
    Regression: the loss can be anywhere in [0, B], so max(g, B - g)^2. ``outputs`` must
    be validated by ``spec.check_outputs``.
    """
    if spec.is_classification:
        g = np.clip(np.asarray(expected, dtype=np.float64), 0.0, spec.bound)
        table = spec.loss_table(outputs)
        return np.asarray(np.max((table - g[:, None]) ** 2, axis=1))
    return loss_reach(expected, spec.bound) ** 2


def worst_squared_deviation_of(scores: SurrogateScores, *, loss_bound: float) -> np.ndarray:
    """The scores' ``worst_squared_deviation``, or when they carry none the form any loss
    in [0, B] allows, max(g, B - g)^2 (the selection hedge needs one or the other)."""
    if scores.worst_squared_deviation is not None:
        return scores.worst_squared_deviation
    return loss_reach(scores.expected_loss, loss_bound) ** 2


def _design(
    features: object, outputs: np.ndarray, feature_dim: int, *, name: str = "features"
) -> np.ndarray:
    """The trees' inputs: features, then the model's outputs."""
    x = check_finite_array(name, features, ndim=2)
    if feature_dim >= 0 and x.shape[1] != feature_dim:
        raise ValueError(f"{name} has {x.shape[1]} columns, surrogate was fitted on {feature_dim}.")
    columns = outputs if outputs.ndim == 2 else outputs[:, None]
    return np.hstack([x, columns])


def _log_init(outputs: np.ndarray, temperature: float = 1.0) -> np.ndarray:
    """Log of the temperature-scaled model probabilities (the boosting start)."""
    logits = np.log(np.clip(outputs, CROSS_ENTROPY_CLIP, 1.0)) / temperature
    logits = logits - logits.max(axis=1, keepdims=True)
    return np.asarray(logits - np.log(np.exp(logits).sum(axis=1, keepdims=True)))


def _fit_temperature(
    outputs: np.ndarray, labels: np.ndarray, weight: np.ndarray | None = None
) -> float:
    """One temperature T for softmax(log p / T), by penalised likelihood on a grid.

    Temperature scaling ("On Calibration of Modern Neural Networks", ICML 2017) needs one
    parameter, so it corrects an over- or under-confident model from a handful of labels.
    The penalty (log T)^2 / (2 * 0.5^2) (a log-normal prior around T = 1, our choice) keeps
    T near 1 until the labels insist. ``weight``: per-row weights of the likelihood (pool
    labels 1, validation rows their share), None for all 1.
    """
    grid = np.exp(np.linspace(np.log(0.25), np.log(20.0), 97))
    logs = np.log(np.clip(outputs, CROSS_ENTROPY_CLIP, 1.0))
    rows = np.arange(labels.shape[0])
    best, best_value = 1.0, np.inf
    for temperature in grid:
        scaled = logs / temperature
        scaled = scaled - scaled.max(axis=1, keepdims=True)
        log_norm = np.log(np.exp(scaled).sum(axis=1))
        terms = log_norm - scaled[rows, labels]
        nll = float(np.sum(terms if weight is None else weight * terms))
        value = nll + np.log(temperature) ** 2 / (2 * 0.5**2)
        if value < best_value:
            best, best_value = float(temperature), value
    return best


def _class_probabilities(
    booster: lgb.Booster,
    x: np.ndarray,
    outputs: np.ndarray,
    seen: tuple[int, ...],
    init: np.ndarray,
) -> np.ndarray:
    with _NATIVE_CALLS:
        raw = booster.predict(x, raw_score=True) + init
    raw = raw - raw.max(axis=1, keepdims=True)
    learned = np.exp(raw)
    k = outputs.shape[1]
    seen_mask = np.zeros(k, dtype=bool)
    seen_mask[list(seen)] = True
    # Unseen classes keep their start probability (the model's own, temperature-scaled):
    # the boosting saw no example of them, so its push towards 0 is not evidence. Seen
    # classes share the rest in the proportions the boosted model learned.
    start = np.exp(init)
    start = start / start.sum(axis=1, keepdims=True)
    unseen_mass = start[:, ~seen_mask].sum(axis=1, keepdims=True)
    learned_seen = learned[:, seen_mask]
    learned_seen = learned_seen / learned_seen.sum(axis=1, keepdims=True)
    pi = start.copy()
    pi[:, seen_mask] = learned_seen * np.clip(1.0 - unseen_mass, 0.0, 1.0)
    return np.asarray(pi / pi.sum(axis=1, keepdims=True))


def _params(
    settings: SurrogateSettings, objective: str, seed: int, **extra: object
) -> dict[str, object]:
    params: dict[str, object] = {
        "objective": objective,
        "num_leaves": settings.num_leaves,
        "min_data_in_leaf": settings.min_data_in_leaf,
        "min_data_in_bin": 1,
        "min_sum_hessian_in_leaf": 1e-3,
        "learning_rate": settings.learning_rate,
        "lambda_l2": settings.lambda_l2,
        "max_bin": settings.max_bin,
        "num_threads": settings.num_threads,
        "deterministic": True,
        "force_row_wise": True,
        "seed": seed,
        "verbose": -1,
    }
    params.update(extra)
    return params


def _train(
    params: dict[str, object],
    x: np.ndarray,
    y: np.ndarray,
    init: np.ndarray | None,
    *,
    settings: SurrogateSettings,
    rng: np.random.Generator,
    weight: np.ndarray | None = None,
) -> lgb.Booster:
    with _NATIVE_CALLS:
        return _train_unlocked(params, x, y, init, settings=settings, rng=rng, weight=weight)


def _train_unlocked(
    params: dict[str, object],
    x: np.ndarray,
    y: np.ndarray,
    init: np.ndarray | None,
    *,
    settings: SurrogateSettings,
    rng: np.random.Generator,
    weight: np.ndarray | None = None,
) -> lgb.Booster:
    n = x.shape[0]
    rows = np.arange(n)
    stop_rows: np.ndarray | None = None  # rows that pick the number of rounds, if any
    if n >= settings.early_stopping_min_labels:
        order = rng.permutation(n)
        cut = n // 5
        stop_rows, rows = order[:cut], order[cut:]
    sample = rng.choice(rows, size=rows.size, replace=True)
    train = lgb.Dataset(
        x[sample],
        label=y[sample],
        init_score=None if init is None else init[sample],
        weight=None if weight is None else weight[sample],
        params={"verbose": -1, "min_data_in_bin": 1, "max_bin": settings.max_bin},
        free_raw_data=True,
    )
    valid_sets: list[lgb.Dataset] | None = None
    callbacks: list[Any] | None = None
    if stop_rows is not None:
        valid = lgb.Dataset(
            x[stop_rows],
            label=y[stop_rows],
            init_score=None if init is None else init[stop_rows],
            weight=None if weight is None else weight[stop_rows],
            params={"verbose": -1},
            reference=train,
        )
        valid_sets = [valid]
        callbacks = [lgb.early_stopping(_EARLY_STOPPING_PATIENCE, verbose=False)]
    return lgb.train(
        params,
        train,
        num_boost_round=settings.num_rounds,
        valid_sets=valid_sets,
        callbacks=callbacks,
    )


def fit_surrogate(
    spec: LossSpec,
    features: object,
    outputs: object,
    labels: object,
    *,
    version: int,
    seed: int,
    settings: SurrogateSettings | None = None,
    validation: ValidationRows | None = None,
) -> Surrogate:
    """Fit the warm-started LightGBM ensemble on labeled pool items (features (n, d),
    outputs, labels) and, if given, on ``validation`` rows from outside the pool.

    With neither it returns the cold start under ``version`` (regression: below
    MIN_REGRESSION_LABELS rows in all). Without validation rows (None or empty) the fit is
    exactly the pool-labels-only one. ValueError names the argument and the rule when
    shapes, outputs or labels are invalid.
    """
    settings = settings or SurrogateSettings()
    if int(version) != version or version < 0:
        raise ValueError(f"version = {describe(version)}: must be an integer >= 0.")
    out = spec.check_outputs(outputs)
    y = spec.check_labels(labels, out.shape[0])
    x = _design(features, out, -1)
    if x.shape[0] != out.shape[0]:
        raise ValueError(f"features has {x.shape[0]} rows: must match outputs ({out.shape[0]}).")
    feature_dim = x.shape[1] - (out.shape[1] if out.ndim == 2 else 1)
    n = out.shape[0]
    if validation is not None and len(validation):
        return _fit_with_validation(
            spec,
            x,
            out,
            y,
            validation,
            feature_dim=feature_dim,
            version=version,
            seed=seed,
            settings=settings,
        )
    if n == 0 or (not spec.is_classification and n < MIN_REGRESSION_LABELS):
        # Regression has no label-free spread signal: a boosted fit on a handful of labels
        # would be confidently wrong, so the pessimistic cold start stays until there are
        # MIN_REGRESSION_LABELS labels.
        return Surrogate(spec, version=version, label_count=n, feature_dim=feature_dim)
    rng = np.random.default_rng(seed)
    if n > settings.max_training_rows:
        keep = np.sort(rng.choice(n, size=settings.max_training_rows, replace=False))
        x, out, y = x[keep], out[keep], y[keep]
    temperature = _fit_temperature(out, y) if spec.is_classification else 1.0
    boosters, variance_boosters, seen = _fit_members(
        spec, x, out, y, temperature, None, seed=seed, settings=settings, rng=rng
    )
    _LOG.debug("fitted surrogate version %s on %s labels", version, n)
    return Surrogate(
        spec,
        version=version,
        label_count=n,
        boosters=boosters,
        variance_boosters=variance_boosters,
        seen_classes=seen,
        feature_dim=feature_dim,
        temperature=temperature,
    )


def _fit_with_validation(
    spec: LossSpec,
    x: np.ndarray,
    out: np.ndarray,
    y: np.ndarray,
    validation: ValidationRows,
    *,
    feature_dim: int,
    version: int,
    seed: int,
    settings: SurrogateSettings,
) -> Surrogate:
    """Pool labels (design x, outputs, labels: checked by the caller) plus validation rows."""
    n = out.shape[0]
    rng = np.random.default_rng(seed)
    if n > settings.max_training_rows:
        keep = np.sort(rng.choice(n, size=settings.max_training_rows, replace=False))
        x, out, y = x[keep], out[keep], y[keep]
    given = len(validation)
    # Subsample before checking and copying: 100k rows cost no more than the cap.
    rows: np.ndarray | slice = slice(None)
    if given > settings.max_validation_rows:
        rows = np.sort(rng.choice(given, size=settings.max_validation_rows, replace=False))
    v_out = spec.check_outputs(_rows(validation.outputs, rows), name="validation outputs")
    used = v_out.shape[0]
    v_y = spec.check_labels(_rows(validation.labels, rows), used, name="validation labels")
    v_x = _design(
        _rows(validation.features, rows),
        v_out,
        feature_dim,
        name="validation features",
    )
    if v_x.shape[0] != used:
        raise ValueError(
            f"validation features has {v_x.shape[0]} rows: must match validation outputs ({used})."
        )
    if not spec.is_classification and n + used < MIN_REGRESSION_LABELS:
        return Surrogate(
            spec,
            version=version,
            label_count=n,
            feature_dim=feature_dim,
            validation_count=given,
            validation_used=used,
        )
    temperature = 1.0
    if spec.is_classification:
        # The model's calibration on the pool is what matters; the validation rows stand
        # in for it until the pool labels can say (a small total weight: one parameter is
        # pinned down by a hundred labels, and it moved the plug-in's bias most).
        share = min(1.0, settings.temperature_validation_weight / used)
        temperature = _fit_temperature(
            np.concatenate([out, v_out]),
            np.concatenate([y, v_y]),
            np.concatenate([np.ones(n), np.full(used, share)]),
        )
    per_row = min(1.0, settings.validation_weight / used)
    weight = np.concatenate([np.ones(n), np.full(used, per_row)])
    boosters, variance_boosters, seen = _fit_members(
        spec,
        np.vstack([x, v_x]),
        np.concatenate([out, v_out]),
        np.concatenate([y, v_y]),
        temperature,
        weight,
        seed=seed,
        settings=settings,
        rng=rng,
    )
    _LOG.debug(
        "fitted surrogate version %s on %s labels and %s of %s validation rows",
        version,
        n,
        used,
        given,
    )
    return Surrogate(
        spec,
        version=version,
        label_count=n,
        boosters=boosters,
        variance_boosters=variance_boosters,
        seen_classes=seen,
        feature_dim=feature_dim,
        temperature=temperature,
        validation_count=given,
        validation_used=used,
    )


def _rows(values: object, rows: np.ndarray | slice) -> np.ndarray:
    return np.asarray(values)[rows]


def _fit_members(
    spec: LossSpec,
    x: np.ndarray,
    out: np.ndarray,
    y: np.ndarray,
    temperature: float,
    weight: np.ndarray | None,
    *,
    seed: int,
    settings: SurrogateSettings,
    rng: np.random.Generator,
) -> tuple[tuple[lgb.Booster, ...], tuple[lgb.Booster, ...], tuple[int, ...]]:
    """The bootstrap ensemble: (boosters, variance boosters, classes seen)."""
    boosters = []
    variance_boosters = []
    if spec.is_classification:
        k = spec.num_classes
        init = _log_init(out, temperature)
        params = _params(settings, "multiclass", seed, num_class=k)
        for member in range(settings.ensemble_size):
            params["seed"] = seed + member
            boosters.append(
                _train(
                    params, x, y.astype(np.float64), init, settings=settings, rng=rng, weight=weight
                )
            )
        seen = tuple(int(c) for c in np.unique(y))
    else:
        cap = spec.loss_cap
        # Large errors only matter up to the cap: clip them so a few outliers cannot
        # dominate the squared-error fit (2 sqrt(cap) for squared, 2 cap for absolute).
        edge = 2.0 * np.sqrt(cap) if spec.kind is LossKind.SQUARED_ERROR else 2.0 * cap
        error = np.clip(y - out, -edge, edge)
        target = out + error
        squared = error**2
        params = _params(settings, "regression", seed)
        for member in range(settings.ensemble_size):
            params["seed"] = seed + member
            boosters.append(
                _train(params, x, target, out, settings=settings, rng=rng, weight=weight)
            )
            # No init_score: LightGBM starts from the mean squared error by itself.
            variance_boosters.append(
                _train(params, x, squared, None, settings=settings, rng=rng, weight=weight)
            )
        seen = ()
    return tuple(boosters), tuple(variance_boosters), seen
