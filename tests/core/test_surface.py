"""The public surface of leadline.service.estimation is pinned (docs/core-api.md)."""

from __future__ import annotations

import leadline.service.estimation as core
from tests.surface import public_names

# Source: docs/core-api.md, the contract the service and benchmarks program against.
_CONTRACT = {
    "LossKind", "CROSS_ENTROPY_CLIP", "LossSpec",
    "SurrogateScores", "SurrogateSettings", "Surrogate", "cold_start_surrogate",
    "fit_surrogate",
    "usefulness", "DrawBatch", "draw_batch",
    "EstimatorMode", "BoundKind", "Verdict", "DRAW_LABELED", "DRAW_PENDING", "DRAW_SKIPPED",
    "DrawTerms", "PlugInSums", "RiskEstimate", "estimate_risk", "anytime_path",
    "GateDecision", "check_gate", "lure_weights",
}  # fmt: skip

_ADDED = {
    "DEFAULT_FLOOR", "selection_probabilities", "normal_quantile", "normal_cdf",
    "empirical_bernstein_path", "BALANCED_MIN_LABELS", "BET_TRUNCATION", "MAX_LABELS_HINT",
    "PROBABILITY_SUM_TOLERANCE", "concatenate_scores",
    "worst_squared_deviation", "worst_squared_deviation_of",
    "ValidationRows",  # docs/core-api.md, surrogate.py (validation items)
    "estimate_one_sided",  # docs/core-api.md: the gate's one-sided estimate
    # docs/core-api.md, reliance.py (the reliance guard)
    "MIN_DRAWS", "PRIOR_DRAWS", "Reliance", "choose_reliance", "cross_fitted_scores",
    "RANGE_BUCKETS", "DrawIndex",  # docs/core-api.md, draw_index.py (O(k log N) draws)
}  # fmt: skip


def test_all_is_every_public_name_in_order():
    assert core.__all__ == public_names(core)


def test_every_contract_name_is_exported():
    assert set(core.__all__) >= _CONTRACT
    for name in core.__all__:
        assert hasattr(core, name), name


def test_the_surface_is_exactly_the_contract_plus_documented_additions():
    assert set(core.__all__) == _CONTRACT | _ADDED


def test_enum_values_are_the_wire_contracts_suffixes():
    import leadline.v1.leadline_pb2 as pb

    for kind in core.LossKind:
        assert pb.LossKind.Value("LOSS_KIND_" + kind.name) > 0
        assert kind.value == kind.name.lower()
    for mode in core.EstimatorMode:
        assert pb.EstimatorMode.Value("ESTIMATOR_MODE_" + mode.name) > 0
    for bound in core.BoundKind:
        assert pb.BoundKind.Value("BOUND_KIND_" + bound.name) > 0
    for verdict in core.Verdict:
        assert pb.Verdict.Value("VERDICT_" + verdict.name) > 0
