"""Benchmark scenarios: a main model, a pool it is deployed on, and every label of that pool.

All data ships inside scikit-learn (bundled datasets and synthetic generators); nothing is
downloaded. Each scenario trains its main model on one part of the data and uses the rest as
the pool, so the true pool risk (mean loss over the whole pool) is known exactly.

Scenarios are deterministic functions of their name (fixed seeds), so every worker process
can rebuild the same scenario instead of receiving large arrays.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass
from functools import partial

import numpy as np
from sklearn.base import clone
from sklearn.datasets import (
    load_breast_cancer,
    load_digits,
    make_classification,
    make_friedman1,
    make_regression,
)
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.linear_model import LinearRegression, LogisticRegression, Ridge
from sklearn.model_selection import cross_val_predict, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.tree import DecisionTreeClassifier

from leadline.service.estimation import LossKind, LossSpec, ValidationRows

__all__ = [
    "HARD_SCENARIO_NAMES",
    "QUICK_SCENARIO_NAMES",
    "SCENARIO_NAMES",
    "Scenario",
    "build_scenario",
]

_LOG = logging.getLogger(__name__)


@dataclass(frozen=True, kw_only=True)
class Scenario:
    """One pool with its main model's outputs and all its labels.

    ``features`` are what the surrogate sees besides ``outputs`` (the main model's class
    probabilities ``(n, K)`` or predictions ``(n,)``); ``losses`` are the true per-item losses
    and ``true_risk`` their mean, the quantity every method estimates.
    """

    name: str
    description: str
    spec: LossSpec
    features: np.ndarray
    outputs: np.ndarray
    labels: np.ndarray
    losses: np.ndarray
    true_risk: float
    well_fit_classifier: bool
    #: Built to break estimators (rare costly mistakes, heavy tails, no signal to learn).
    hard: bool = False
    #: The team's own labeled rows: the main model's out-of-fold outputs (5 folds,
    #: ``cross_val_predict``) on the scenario's training part, as a team would upload them.
    validation: ValidationRows | None = None

    @property
    def pool_size(self) -> int:
        return int(self.features.shape[0])


def _finish(
    *,
    name: str,
    description: str,
    spec: LossSpec,
    features: np.ndarray,
    outputs: np.ndarray,
    labels: np.ndarray,
    well_fit_classifier: bool = False,
    hard: bool = False,
    training: tuple[object, np.ndarray, np.ndarray] | None = None,
) -> Scenario:
    """``training`` = (main model, its training features, its training targets): the
    scenario's validation rows are the model's out-of-fold outputs on them."""
    losses = np.asarray(spec.losses(outputs, labels), dtype=float)
    validation = None
    if training is not None:
        model, x_train, y_train = training
        classification = spec.is_classification
        method = "predict_proba" if classification else "predict"
        held_out = cross_val_predict(clone(model), x_train, y_train, cv=5, method=method)
        if classification:
            held_out = held_out / held_out.sum(axis=1, keepdims=True)
        validation = ValidationRows(
            features=np.ascontiguousarray(x_train, dtype=float),
            outputs=np.ascontiguousarray(held_out, dtype=float),
            labels=np.asarray(y_train, dtype=np.int64 if classification else float),
        )
    return Scenario(
        name=name,
        description=description,
        spec=spec,
        features=np.ascontiguousarray(features, dtype=float),
        outputs=np.ascontiguousarray(outputs, dtype=float),
        labels=labels,
        losses=losses,
        true_risk=float(losses.mean()),
        well_fit_classifier=well_fit_classifier,
        hard=hard,
        validation=validation,
    )


def _digits_logistic(*, quick: bool) -> Scenario:
    del quick  # the pool is small already
    data = load_digits()
    x_train, x_pool, y_train, y_pool = train_test_split(
        data.data, data.target, train_size=600, random_state=11, stratify=data.target
    )
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=3000))
    model.fit(x_train, y_train)
    return _finish(
        name="digits_logistic",
        description="digits (sklearn), logistic regression on 600 images, pool 1,197, 0-1 loss",
        spec=LossSpec(kind=LossKind.ZERO_ONE, num_classes=10),
        features=x_pool,
        outputs=model.predict_proba(x_pool),
        labels=y_pool.astype(np.int64),
        well_fit_classifier=True,
        training=(model, x_train, y_train),
    )


def _digits_shallow_tree(*, quick: bool) -> Scenario:
    del quick
    data = load_digits()
    x_train, x_pool, y_train, y_pool = train_test_split(
        data.data, data.target, train_size=600, random_state=12, stratify=data.target
    )
    # Depth 4 on ten classes: a deliberately weak main model (accuracy well below 80%).
    model = DecisionTreeClassifier(max_depth=4, random_state=0).fit(x_train, y_train)
    return _finish(
        name="digits_weak_tree",
        description="digits (sklearn), depth-4 decision tree (weak model), pool 1,197, 0-1 loss",
        spec=LossSpec(kind=LossKind.ZERO_ONE, num_classes=10),
        features=x_pool,
        outputs=model.predict_proba(x_pool),
        labels=y_pool.astype(np.int64),
        training=(model, x_train, y_train),
    )


def _breast_cancer(*, quick: bool) -> Scenario:
    del quick
    data = load_breast_cancer()
    x_train, x_pool, y_train, y_pool = train_test_split(
        data.data, data.target, train_size=170, random_state=13, stratify=data.target
    )
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.5, max_iter=3000))
    model.fit(x_train, y_train)
    return _finish(
        name="breast_cancer",
        description="breast cancer (sklearn), logistic regression on 170 rows, pool 399, Brier",
        spec=LossSpec(kind=LossKind.BRIER, num_classes=2),
        features=x_pool,
        outputs=model.predict_proba(x_pool),
        labels=y_pool.astype(np.int64),
        well_fit_classifier=True,
        training=(model, x_train, y_train),
    )


def _shifted_synthetic(*, quick: bool) -> Scenario:
    pool_size = 12_000 if quick else 50_000
    train_size = 8_000
    total = 2 * (pool_size + train_size)
    x, y = make_classification(
        n_samples=total,
        n_features=20,
        n_informative=8,
        n_redundant=4,
        n_clusters_per_class=2,
        flip_y=0.03,
        class_sep=1.5,
        random_state=14,
    )
    rng = np.random.default_rng(14)
    # Covariate shift: training rows come mostly from low values of one informative
    # direction, pool rows mostly from high values.
    direction = x[:, 0] + x[:, 1]
    train_weight = 1.0 / (1.0 + np.exp(1.5 * direction))
    train_idx = rng.choice(
        total, size=train_size, replace=False, p=train_weight / train_weight.sum()
    )
    rest = np.setdiff1d(np.arange(total), train_idx)
    pool_weight = 1.0 - train_weight[rest]
    pool_idx = rng.choice(rest, size=pool_size, replace=False, p=pool_weight / pool_weight.sum())
    # Boosted trees without early stopping: confident everywhere, so the 3% flipped labels
    # and the shifted region become rare, costly mistakes (the top 1% of items carry
    # roughly half of the pool's cross-entropy).
    model = HistGradientBoostingClassifier(max_iter=300, early_stopping=False, random_state=0)
    model.fit(x[train_idx], y[train_idx])
    return _finish(
        name="shifted_synthetic",
        description=(
            f"make_classification (sklearn), covariate shift between 8,000 training rows and "
            f"a pool of {pool_size:,}, overconfident boosted trees, cross-entropy loss"
        ),
        spec=LossSpec(kind=LossKind.CROSS_ENTROPY, num_classes=2),
        features=x[pool_idx],
        outputs=model.predict_proba(x[pool_idx]),
        labels=y[pool_idx].astype(np.int64),
        training=(model, x[train_idx], y[train_idx]),
    )


def _friedman_regression(*, quick: bool) -> Scenario:
    pool_size = 4_000 if quick else 9_000
    x, y = make_friedman1(n_samples=3_000 + pool_size, n_features=10, noise=1.0, random_state=15)
    x_train, x_pool, y_train, y_pool = train_test_split(x, y, train_size=3_000, random_state=15)
    # A linear model on a non-linear target: the residuals have structure a surrogate can learn.
    model = Ridge(alpha=1.0).fit(x_train, y_train)
    train_error = (model.predict(x_train) - y_train) ** 2
    # The cap is set from the training part only (no pool labels): its 99th percentile.
    cap = float(np.quantile(train_error, 0.99))
    return _finish(
        name="friedman_regression",
        description=(
            f"make_friedman1 (sklearn), ridge regression on 3,000 rows, pool {pool_size:,}, "
            f"squared error capped at {cap:.1f} (training 99th percentile)"
        ),
        spec=LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=cap),
        features=x_pool,
        outputs=model.predict(x_pool),
        labels=y_pool.astype(float),
        training=(model, x_train, y_train),
    )


# Row = predicted class, column = true class. Invented triage costs: missing the urgent
# class (2) is expensive, a false alarm for it cheaper.
_COSTS = np.array([[0.0, 1.0, 6.0], [1.0, 0.0, 4.0], [2.0, 1.0, 0.0]])


def _cost_matrix_synthetic(*, quick: bool) -> Scenario:
    pool_size = 4_000 if quick else 10_000
    x, y = make_classification(
        n_samples=3_000 + pool_size,
        n_features=12,
        n_informative=6,
        n_redundant=2,
        n_classes=3,
        n_clusters_per_class=2,
        weights=[0.5, 0.35, 0.15],
        flip_y=0.02,
        class_sep=1.2,
        random_state=16,
    )
    x_train, x_pool, y_train, y_pool = train_test_split(
        x, y, train_size=3_000, random_state=16, stratify=y
    )
    model = LogisticRegression(max_iter=3000).fit(x_train, y_train)
    return _finish(
        name="cost_matrix_triage",
        description=(
            f"make_classification (sklearn), 3 classes, logistic regression, pool {pool_size:,}, "
            "invented triage cost matrix (max cost 6)"
        ),
        spec=LossSpec(kind=LossKind.COST_MATRIX, num_classes=3, cost_matrix=_COSTS.copy()),
        features=x_pool,
        outputs=model.predict_proba(x_pool),
        labels=y_pool.astype(np.int64),
        training=(model, x_train, y_train),
    )


# --------------------------------------------------------------------------------------
# Hard pools: each one is built so that a surrogate-driven estimate can go wrong.


def _rare_mistakes(*, marked: bool, quick: bool = False) -> Scenario:
    """A near-perfect, extremely confident classifier; 10 of 2,000 pool labels disagree.

    ``marked``: the 10 mistakes are the items with the largest value of a feature the
    model never used (a signature a surrogate can learn once it has seen one); otherwise
    they are scattered at random (nothing to learn).
    """
    del quick  # these pools are small already
    x, y = make_classification(
        n_samples=6_000,
        n_features=10,
        n_informative=5,
        n_redundant=0,
        n_clusters_per_class=1,
        flip_y=0.0,
        class_sep=3.0,
        random_state=31,
    )
    x_train, x_pool, y_train, y_pool = train_test_split(x, y, train_size=4_000, random_state=31)
    model = HistGradientBoostingClassifier(max_iter=200, early_stopping=False, random_state=0)
    model.fit(x_train, y_train)
    outputs = model.predict_proba(x_pool)
    labels = y_pool.astype(np.int64).copy()
    correct = np.flatnonzero(outputs.argmax(axis=1) == labels)
    if marked:
        # Column 9 is pure noise for make_classification with 5 informative features.
        wrong = correct[np.argsort(-x_pool[correct, 9], kind="stable")][:10]
    else:
        wrong = np.random.default_rng(31).choice(correct, size=10, replace=False)
    labels[wrong] = 1 - labels[wrong]
    kind = "marked by one unused feature" if marked else "scattered at random"
    return _finish(
        name="rare_mistakes_marked" if marked else "rare_mistakes_scattered",
        description=(
            "make_classification (sklearn), boosted trees at >= 0.9999 confidence, pool "
            f"2,000 with 10 flipped labels {kind}, 0-1 loss"
        ),
        spec=LossSpec(kind=LossKind.ZERO_ONE, num_classes=2),
        features=x_pool,
        outputs=outputs,
        labels=labels,
        hard=True,
        training=(model, x_train, y_train),
    )


def _rare_class(*, kind: LossKind, quick: bool = False) -> Scenario:
    """A 4% class and a depth-3 tree: the mistakes sit in the rare class."""
    del quick  # these pools are small already
    x, y = make_classification(
        n_samples=7_000,
        n_features=12,
        n_informative=4,
        n_redundant=2,
        weights=[0.96, 0.04],
        flip_y=0.0,
        class_sep=0.8,
        random_state=32,
    )
    x_train, x_pool, y_train, y_pool = train_test_split(
        x, y, train_size=3_000, random_state=32, stratify=y
    )
    model = DecisionTreeClassifier(max_depth=3, random_state=0).fit(x_train, y_train)
    loss_name = "0-1 loss" if kind is LossKind.ZERO_ONE else "cross-entropy"
    return _finish(
        name="rare_class_tree" if kind is LossKind.ZERO_ONE else "rare_class_tree_xent",
        description=(
            f"make_classification (sklearn), 4% minority class, depth-3 tree, pool 4,000, "
            f"{loss_name}"
        ),
        spec=LossSpec(kind=kind, num_classes=2),
        features=x_pool,
        outputs=model.predict_proba(x_pool),
        labels=y_pool.astype(np.int64),
        hard=True,
        training=(model, x_train, y_train),
    )


def _heavy_tail_regression(*, quick: bool = False) -> Scenario:
    """Student-t (2 degrees of freedom) noise: a few capped squared errors dominate."""
    del quick  # these pools are small already
    x, y = make_regression(n_samples=9_000, n_features=8, n_informative=6, random_state=33)
    y = y + 10.0 * np.random.default_rng(33).standard_t(2, size=y.shape)
    x_train, x_pool, y_train, y_pool = train_test_split(x, y, train_size=3_000, random_state=33)
    model = Ridge(alpha=1.0).fit(x_train, y_train)
    cap = float(np.quantile((model.predict(x_train) - y_train) ** 2, 0.995))
    return _finish(
        name="heavy_tail_regression",
        description=(
            "make_regression (sklearn) plus Student-t(2) noise, ridge regression, pool "
            f"6,000, squared error capped at {cap:,.0f} (training 99.5th percentile)"
        ),
        spec=LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=cap),
        features=x_pool,
        outputs=model.predict(x_pool),
        labels=y_pool.astype(float),
        hard=True,
        training=(model, x_train, y_train),
    )


def _noise_only_regression(*, quick: bool = False) -> Scenario:
    """A correct linear model with Gaussian noise: no feature predicts the loss."""
    del quick  # these pools are small already
    x, y = make_regression(
        n_samples=9_000, n_features=8, n_informative=6, noise=20.0, random_state=34
    )
    x_train, x_pool, y_train, y_pool = train_test_split(x, y, train_size=3_000, random_state=34)
    model = LinearRegression().fit(x_train, y_train)
    cap = float(np.quantile((model.predict(x_train) - y_train) ** 2, 0.99))
    return _finish(
        name="noise_only_regression",
        description=(
            "make_regression (sklearn), Gaussian noise, the true linear model, pool 6,000, "
            f"squared error capped at {cap:,.0f}: nothing for a surrogate to learn"
        ),
        spec=LossSpec(kind=LossKind.SQUARED_ERROR, loss_cap=cap),
        features=x_pool,
        outputs=model.predict(x_pool),
        labels=y_pool.astype(float),
        hard=True,
        training=(model, x_train, y_train),
    )


_BUILDERS: dict[str, Callable[..., Scenario]] = {
    "digits_logistic": _digits_logistic,
    "digits_weak_tree": _digits_shallow_tree,
    "breast_cancer": _breast_cancer,
    "shifted_synthetic": _shifted_synthetic,
    "friedman_regression": _friedman_regression,
    "cost_matrix_triage": _cost_matrix_synthetic,
    "rare_mistakes_scattered": partial(_rare_mistakes, marked=False),
    "rare_mistakes_marked": partial(_rare_mistakes, marked=True),
    "rare_class_tree": partial(_rare_class, kind=LossKind.ZERO_ONE),
    "rare_class_tree_xent": partial(_rare_class, kind=LossKind.CROSS_ENTROPY),
    "heavy_tail_regression": _heavy_tail_regression,
    "noise_only_regression": _noise_only_regression,
}

SCENARIO_NAMES: tuple[str, ...] = tuple(_BUILDERS)
#: The pools built to break estimators (``Scenario.hard``).
HARD_SCENARIO_NAMES: tuple[str, ...] = (
    "rare_mistakes_scattered",
    "rare_mistakes_marked",
    "rare_class_tree",
    "rare_class_tree_xent",
    "heavy_tail_regression",
    "noise_only_regression",
)
QUICK_SCENARIO_NAMES: tuple[str, ...] = ("digits_logistic", "breast_cancer", "shifted_synthetic")


def build_scenario(name: str, *, quick: bool = False) -> Scenario:
    """Build scenario ``name`` (one of ``SCENARIO_NAMES``); ``quick`` shrinks large pools."""
    if name not in _BUILDERS:
        known = ", ".join(SCENARIO_NAMES)
        raise ValueError(f"scenario {name!r} is unknown: must be one of {known}.")
    scenario = _BUILDERS[name](quick=quick)
    _LOG.debug("built %s: N=%d risk=%.4f", name, scenario.pool_size, scenario.true_risk)
    return scenario
