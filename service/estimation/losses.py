"""Loss definitions: the single owner of how one item's loss is computed.

Every other part of leadline (server, benchmarks, tests) computes losses through
:class:`LossSpec`. Classification outputs are (n, K) probability rows; regression outputs
are (n,) predictions. Each spec also knows its bound B (the largest loss one item can
have, which every confidence bound works in) and the expected loss of the model's
prediction under a predictive distribution of the label, used by the surrogate.

Definitions (they match the wire contract's LossKind comments):

- ZERO_ONE: 1 if argmax(p) != y else 0; B = 1.
- CROSS_ENTROPY: -log(clip(p_y, CROSS_ENTROPY_CLIP, 1)); B = -log(CROSS_ENTROPY_CLIP).
- BRIER: sum_k (p_k - 1[k = y])^2 (the multiclass form, range [0, 2]); B = 2.
- COST_MATRIX: cost[argmax(p), y] (row = predicted, column = true); B = max cost.
- SQUARED_ERROR: min((f - y)^2, loss_cap); B = loss_cap.
- ABSOLUTE_ERROR: min(|f - y|, loss_cap); B = loss_cap.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np

from ._checks import check_finite_array, describe
from .normal import normal_cdf, normal_pdf

__all__ = [
    "CROSS_ENTROPY_CLIP",
    "PROBABILITY_SUM_TOLERANCE",
    "LossKind",
    "LossSpec",
]

#: Probabilities are clipped to [CLIP, 1] before the logarithm so the loss stays bounded
#: (B = -log(1e-6) ~ 13.8). Fixed by the wire contract.
CROSS_ENTROPY_CLIP: float = 1e-6

#: How far a row of class probabilities may sum from 1 (float32 model outputs drift ~1e-7;
#: common practice, no source).
PROBABILITY_SUM_TOLERANCE: float = 1e-4


class LossKind(enum.Enum):
    """How one item's loss is computed; values are the proto enum's suffixes, lower-case."""

    ZERO_ONE = "zero_one"
    CROSS_ENTROPY = "cross_entropy"
    BRIER = "brier"
    COST_MATRIX = "cost_matrix"
    SQUARED_ERROR = "squared_error"
    ABSOLUTE_ERROR = "absolute_error"

    @property
    def is_classification(self) -> bool:
        """True for the kinds that compare class probabilities with a class label."""
        return self in _CLASSIFICATION


_CLASSIFICATION = {
    LossKind.ZERO_ONE,
    LossKind.CROSS_ENTROPY,
    LossKind.BRIER,
    LossKind.COST_MATRIX,
}


def loss_reach(expected_loss: np.ndarray, loss_bound: float) -> np.ndarray:
    """max(g, B - g): the farthest a loss in [0, B] can lie from its prediction g (g is
    clipped into [0, B] first). The one place this bound is written."""
    g = np.clip(np.asarray(expected_loss, dtype=np.float64), 0.0, loss_bound)
    return np.maximum(g, loss_bound - g)


@dataclass(frozen=True, kw_only=True, eq=False)
class LossSpec:
    """A validated loss definition.

    ``num_classes`` (>= 2) is required for classification kinds, ``cost_matrix`` (K, K),
    finite, >= 0 with at least one positive entry for COST_MATRIX, and ``loss_cap`` (> 0,
    finite) for the regression kinds. Raises ``ValueError`` naming field, value and rule.
    """

    kind: LossKind
    num_classes: int = 0
    cost_matrix: np.ndarray | None = None
    loss_cap: float = 0.0

    def __post_init__(self) -> None:
        if not isinstance(self.kind, LossKind):
            raise ValueError(f"kind = {describe(self.kind)}: must be a LossKind member.")
        if self.kind in _CLASSIFICATION:
            if int(self.num_classes) != self.num_classes or self.num_classes < 2:
                raise ValueError(
                    f"num_classes = {describe(self.num_classes)}: must be an integer >= 2 "
                    f"for {self.kind.name}."
                )
            object.__setattr__(self, "num_classes", int(self.num_classes))
        else:
            cap = float(self.loss_cap)
            if not (math.isfinite(cap) and cap > 0.0):
                raise ValueError(
                    f"loss_cap = {describe(self.loss_cap)}: must be finite and > 0 for "
                    f"{self.kind.name} (bounds need a finite cap)."
                )
            object.__setattr__(self, "loss_cap", cap)
        if self.kind is LossKind.COST_MATRIX:
            if self.cost_matrix is None:
                raise ValueError("cost_matrix = None: must be given for COST_MATRIX.")
            matrix = check_finite_array("cost_matrix", self.cost_matrix, ndim=2)
            k = self.num_classes
            if matrix.shape != (k, k):
                raise ValueError(
                    f"cost_matrix has shape {matrix.shape}: must be ({k}, {k}) "
                    "(num_classes x num_classes, row = predicted, column = true)."
                )
            if np.any(matrix < 0) or not np.any(matrix > 0):
                raise ValueError(
                    f"cost_matrix = {describe(matrix)}: entries must be >= 0 with at least one > 0."
                )
            matrix = matrix.copy()
            matrix.setflags(write=False)
            object.__setattr__(self, "cost_matrix", matrix)
        elif self.cost_matrix is not None:
            raise ValueError(
                f"cost_matrix = {describe(self.cost_matrix)}: must be None for {self.kind.name}."
            )

    def __repr__(self) -> str:
        if self.is_classification:
            return f"LossSpec(kind={self.kind.name}, num_classes={self.num_classes})"
        return f"LossSpec(kind={self.kind.name}, loss_cap={self.loss_cap})"

    @property
    def is_classification(self) -> bool:
        return self.kind in _CLASSIFICATION

    @property
    def bound(self) -> float:
        """B: the largest possible loss of one item."""
        if self.kind is LossKind.ZERO_ONE:
            return 1.0
        if self.kind is LossKind.CROSS_ENTROPY:
            return -math.log(CROSS_ENTROPY_CLIP)
        if self.kind is LossKind.BRIER:
            return 2.0
        if self.kind is LossKind.COST_MATRIX:
            assert self.cost_matrix is not None
            return float(self.cost_matrix.max())
        return self.loss_cap

    # ----------------------------------------------------------------------------------
    # validation

    def check_outputs(self, outputs: object, *, name: str = "outputs") -> np.ndarray:
        """Model outputs as a float array: (n, K) probability rows or (n,) predictions."""
        if self.is_classification:
            probs = check_finite_array(name, outputs, ndim=2)
            if probs.shape[1] != self.num_classes:
                raise ValueError(
                    f"{name} has {probs.shape[1]} columns, pool has {self.num_classes} classes."
                )
            if probs.size and (probs.min() < 0.0 or probs.max() > 1.0):
                raise ValueError(
                    f"{name} min = {describe(probs.min())}, max = {describe(probs.max())}, "
                    "probabilities must lie in [0, 1]."
                )
            sums = probs.sum(axis=1)
            off = np.abs(sums - 1.0) > PROBABILITY_SUM_TOLERANCE
            if np.any(off):
                row = int(np.flatnonzero(off)[0])
                raise ValueError(
                    f"{name}[{row}] sums to {describe(sums[row])}: probabilities must sum to 1 "
                    f"within {PROBABILITY_SUM_TOLERANCE}."
                )
            return probs
        return check_finite_array(name, outputs, ndim=1)

    def check_labels(self, labels: object, count: int, *, name: str = "labels") -> np.ndarray:
        """Labels as class indices in [0, K) or finite real values, ``count`` of them."""
        values = check_finite_array(name, labels, ndim=1)
        if values.shape[0] != count:
            raise ValueError(f"{name} has {values.shape[0]} entries: must match outputs ({count}).")
        if not self.is_classification:
            return values
        integral = values == np.round(values)
        in_range = (values >= 0) & (values < self.num_classes)
        bad = np.flatnonzero(~(integral & in_range))
        if bad.size:
            i = int(bad[0])
            raise ValueError(
                f"{name}[{i}] = {describe(values[i])}:"
                f" must be a class index in [0, {self.num_classes})."
            )
        return values.astype(np.int64)

    # ----------------------------------------------------------------------------------
    # losses

    def loss_table(self, outputs: np.ndarray) -> np.ndarray:
        """(n, K) table: loss of each item's prediction if its true class were k.

        Classification only; ``outputs`` must already be validated.
        """
        n, k = outputs.shape
        if self.kind is LossKind.ZERO_ONE:
            table = np.ones((n, k))
            table[np.arange(n), np.argmax(outputs, axis=1)] = 0.0
            return table
        if self.kind is LossKind.CROSS_ENTROPY:
            return np.asarray(-np.log(np.clip(outputs, CROSS_ENTROPY_CLIP, 1.0)))
        if self.kind is LossKind.BRIER:
            # sum_j (p_j - 1[j = y])^2 = sum_j p_j^2 - 2 p_y + 1
            return np.asarray(
                (np.sum(outputs**2, axis=1, keepdims=True) - 2.0 * outputs + 1.0).clip(0.0, 2.0)
            )
        assert self.cost_matrix is not None
        return np.asarray(self.cost_matrix[np.argmax(outputs, axis=1)])

    def losses(self, outputs: object, labels: object) -> np.ndarray:
        """Per-item losses in [0, B]: ``outputs`` (n, K) probabilities or (n,) predictions,
        ``labels`` (n,) class indices or real values."""
        out = self.check_outputs(outputs)
        y = self.check_labels(labels, out.shape[0])
        if self.is_classification:
            n = out.shape[0]
            if self.kind is LossKind.BRIER:
                onehot = np.zeros_like(out)
                onehot[np.arange(n), y] = 1.0
                return np.asarray(np.sum((out - onehot) ** 2, axis=1))
            if self.kind is LossKind.CROSS_ENTROPY:
                return np.asarray(-np.log(np.clip(out[np.arange(n), y], CROSS_ENTROPY_CLIP, 1.0)))
            return np.asarray(self.loss_table(out)[np.arange(n), y])
        error = out - y
        if self.kind is LossKind.SQUARED_ERROR:
            return np.asarray(np.minimum(error**2, self.loss_cap))
        return np.asarray(np.minimum(np.abs(error), self.loss_cap))

    def expected_losses(self, outputs: object, predictive: object) -> tuple[np.ndarray, np.ndarray]:
        """(E[L], E[L^2]) per item when the label follows ``predictive``.

        Classification: ``predictive`` is (n, K) class probabilities and
        E[L^k] = sum_y pi(y) loss(f, y)^k. Regression: ``predictive`` is a pair
        (mean (n,), variance (n,)) of a Gaussian target; the clipped moments are computed
        in closed form from truncated-normal moments.
        """
        out = self.check_outputs(outputs)
        if self.is_classification:
            pi = self.check_outputs(predictive, name="predictive")
            if pi.shape != out.shape:
                raise ValueError(
                    f"predictive has shape {pi.shape}: must match outputs {out.shape}."
                )
            table = self.loss_table(out)
            first = np.sum(pi * table, axis=1)
            second = np.sum(pi * table**2, axis=1)
            return first.clip(0.0, self.bound), second.clip(0.0, self.bound**2)
        if not (isinstance(predictive, tuple) and len(predictive) == 2):
            raise ValueError(
                f"predictive = {describe(predictive)}: must be a (mean, variance) pair "
                "for regression."
            )
        mean = check_finite_array("predictive mean", predictive[0], ndim=1)
        variance = check_finite_array("predictive variance", predictive[1], ndim=1)
        if mean.shape != out.shape or variance.shape != out.shape:
            raise ValueError(
                f"predictive mean/variance have shapes {mean.shape}/{variance.shape}, "
                f"must match outputs {out.shape}."
            )
        if np.any(variance < 0):
            raise ValueError(f"predictive variance min = {describe(variance.min())}: must be >= 0.")
        return _clipped_error_moments(self.kind, mean - out, variance, self.loss_cap)


def _truncated_moments(
    shift: np.ndarray, scale: np.ndarray, low: float, high: float, order: int
) -> list[np.ndarray]:
    """E[d^k 1{low < d < high}] for d ~ N(shift, scale^2), k = 0..order.

    Uses I_k = int_a^b z^k phi(z) dz with I_k = (k-1) I_{k-2} + a^{k-1} phi(a) - b^{k-1} phi(b)
    (integration by parts; textbook identity) and the binomial expansion of (shift + scale z)^k.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        a = (low - shift) / scale
        b = (high - shift) / scale
    pa, pb = normal_pdf(a), normal_pdf(b)
    integrals = [normal_cdf(b) - normal_cdf(a), pa - pb]
    for k in range(2, order + 1):
        with np.errstate(invalid="ignore", over="ignore"):
            ta = np.where(np.isfinite(a), a ** (k - 1) * pa, 0.0)
            tb = np.where(np.isfinite(b), b ** (k - 1) * pb, 0.0)
        integrals.append((k - 1) * integrals[k - 2] + ta - tb)
    moments = []
    for k in range(order + 1):
        total = np.zeros_like(shift)
        for j in range(k + 1):
            total = total + math.comb(k, j) * shift ** (k - j) * scale**j * integrals[j]
        moments.append(total)
    return moments


def _clipped_error_moments(
    kind: LossKind, shift: np.ndarray, variance: np.ndarray, cap: float
) -> tuple[np.ndarray, np.ndarray]:
    """(E[L], E[L^2]) for L = min(d^2, cap) or min(|d|, cap), d ~ N(shift, variance)."""
    # A tiny scale keeps the formulas finite for a point-mass predictive distribution.
    scale = np.sqrt(np.maximum(variance, 1e-24 * max(cap, 1.0) ** 2))
    if kind is LossKind.SQUARED_ERROR:
        edge = math.sqrt(cap)
        m = _truncated_moments(shift, scale, -edge, edge, 4)
        tail = np.clip(1.0 - m[0], 0.0, 1.0)
        first = m[2] + cap * tail
        second = m[4] + cap**2 * tail
    else:
        neg = _truncated_moments(shift, scale, -cap, 0.0, 2)
        pos = _truncated_moments(shift, scale, 0.0, cap, 2)
        tail = np.clip(1.0 - neg[0] - pos[0], 0.0, 1.0)
        first = pos[1] - neg[1] + cap * tail
        second = pos[2] + neg[2] + cap**2 * tail
    first = np.clip(first, 0.0, cap)
    second = np.clip(np.maximum(second, first**2), 0.0, cap**2)
    return first, second
