"""leadline's statistical core: losses, surrogate, selection, estimators, bounds, gate.

Pure numerical code (numpy, scikit-learn, lightgbm): no I/O, no gRPC, no globals; every
random choice takes a ``numpy.random.Generator``. The public surface is documented in
docs/core-api.md and the mathematics in docs/estimation.md.
"""

from .losses import CROSS_ENTROPY_CLIP, PROBABILITY_SUM_TOLERANCE, LossKind, LossSpec
from .normal import normal_cdf, normal_quantile
from .surrogate import (
    Surrogate,
    SurrogateScores,
    SurrogateSettings,
    cold_start_surrogate,
    fit_surrogate,
)

__all__ = [
    "CROSS_ENTROPY_CLIP",
    "PROBABILITY_SUM_TOLERANCE",
    "LossKind",
    "LossSpec",
    "Surrogate",
    "SurrogateScores",
    "SurrogateSettings",
    "cold_start_surrogate",
    "fit_surrogate",
    "normal_cdf",
    "normal_quantile",
]
