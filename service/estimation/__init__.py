"""leadline's statistical core: losses, surrogate, selection, estimators, bounds, gate.

Pure numerical code (numpy, scikit-learn, lightgbm): no I/O, no gRPC, no globals; every
random choice takes a ``numpy.random.Generator``. The public surface is documented in
docs/core-api.md and the mathematics in docs/estimation.md.
"""

from .bounds import BET_TRUNCATION, BoundKind
from .draw_index import RANGE_BUCKETS, DrawIndex
from .estimators import (
    BALANCED_MIN_LABELS,
    EstimatorMode,
    RiskEstimate,
    anytime_path,
    empirical_bernstein_path,
    estimate_one_sided,
    estimate_risk,
    lure_weights,
)
from .gate import MAX_LABELS_HINT, GateDecision, Verdict, check_gate
from .losses import CROSS_ENTROPY_CLIP, PROBABILITY_SUM_TOLERANCE, LossKind, LossSpec
from .normal import normal_cdf, normal_quantile
from .reliance import (
    MIN_DRAWS,
    PRIOR_DRAWS,
    Reliance,
    choose_reliance,
    cross_fitted_scores,
)
from .selection import (
    DEFAULT_FLOOR,
    DrawBatch,
    draw_batch,
    selection_probabilities,
    usefulness,
)
from .surrogate import (
    Surrogate,
    SurrogateScores,
    SurrogateSettings,
    ValidationRows,
    cold_start_surrogate,
    concatenate_scores,
    fit_surrogate,
    worst_squared_deviation,
    worst_squared_deviation_of,
)
from .terms import DRAW_LABELED, DRAW_PENDING, DRAW_SKIPPED, DrawTerms, PlugInSums

__all__ = [
    "BALANCED_MIN_LABELS",
    "BET_TRUNCATION",
    "CROSS_ENTROPY_CLIP",
    "DEFAULT_FLOOR",
    "DRAW_LABELED",
    "DRAW_PENDING",
    "DRAW_SKIPPED",
    "MAX_LABELS_HINT",
    "MIN_DRAWS",
    "PRIOR_DRAWS",
    "PROBABILITY_SUM_TOLERANCE",
    "RANGE_BUCKETS",
    "BoundKind",
    "DrawBatch",
    "DrawIndex",
    "DrawTerms",
    "EstimatorMode",
    "GateDecision",
    "LossKind",
    "LossSpec",
    "PlugInSums",
    "Reliance",
    "RiskEstimate",
    "Surrogate",
    "SurrogateScores",
    "SurrogateSettings",
    "ValidationRows",
    "Verdict",
    "anytime_path",
    "check_gate",
    "choose_reliance",
    "cold_start_surrogate",
    "concatenate_scores",
    "cross_fitted_scores",
    "draw_batch",
    "empirical_bernstein_path",
    "estimate_one_sided",
    "estimate_risk",
    "fit_surrogate",
    "lure_weights",
    "normal_cdf",
    "normal_quantile",
    "selection_probabilities",
    "usefulness",
    "worst_squared_deviation",
    "worst_squared_deviation_of",
]
