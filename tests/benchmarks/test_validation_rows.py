"""The scenarios' validation rows: each scenario's training part with out-of-fold outputs,
and they teach the core's surrogate before any pool label.

Outside sources: out-of-fold outputs are scikit-learn's ``cross_val_predict``; the one-draw
cost is the importance-sampling variance formula ("Monte Carlo theory, methods and
examples", 2013, §9.1) as in ``exact_variance.py``. The two scenarios are the fast ones.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks.experiments.exact_variance import one_draw_cost
from benchmarks.scenarios import build_scenario
from leadline.service.estimation import (
    DEFAULT_FLOOR,
    SurrogateSettings,
    cold_start_surrogate,
    fit_surrogate,
    usefulness,
)


@pytest.mark.parametrize(
    ("name", "rows"), [("digits_weak_tree", 600), ("friedman_regression", 3000)]
)
def test_validation_rows_are_the_training_part_with_out_of_fold_outputs(name, rows):
    scenario = build_scenario(name)
    validation = scenario.validation
    assert validation is not None
    assert len(validation) == rows
    # Rows from outside the pool: none of them is a pool item.
    pool = {row.tobytes() for row in scenario.features}
    assert not any(row.tobytes() in pool for row in validation.features)
    if scenario.spec.is_classification:
        assert validation.outputs.shape == (rows, scenario.spec.num_classes)
        np.testing.assert_allclose(validation.outputs.sum(axis=1), 1.0)
    else:
        assert validation.outputs.shape == (rows,)
    assert np.all(np.isfinite(validation.outputs))


def test_out_of_fold_rows_alone_cut_the_weak_trees_one_draw_cost():
    # Measured 0.60 (cold start) and 0.10 (validation rows, no pool label) with the
    # default settings; the margin here is wide on purpose (fewer members, fewer rounds).
    name = "digits_weak_tree"
    scenario = build_scenario(name)
    spec = scenario.spec
    settings = SurrogateSettings(ensemble_size=2, num_rounds=30)
    taught = fit_surrogate(
        spec,
        scenario.features[:0],
        scenario.outputs[:0],
        scenario.labels[:0],
        version=1,
        seed=0,
        settings=settings,
        validation=scenario.validation,
    )
    costs = []
    for model in (cold_start_surrogate(spec), taught):
        scores = model.score(scenario.features, scenario.outputs)
        u = usefulness(scores, loss_bound=spec.bound)
        costs.append(one_draw_cost(scenario.losses, scores.expected_loss, u, DEFAULT_FLOOR))
    cold, with_rows = costs
    assert cold > 0.5
    assert with_rows < 0.5 * cold
