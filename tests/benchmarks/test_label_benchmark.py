"""Smoke test of the label-efficiency benchmark: the quick harness runs end to end on a
tiny scenario, and the relative-cost interpolation matches hand-computed cases."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from benchmarks.harness import METHODS, HarnessConfig, run_repetition
from benchmarks.labels import main
from benchmarks.report import equivalent_iid_labels, summarize
from benchmarks.scenarios import build_scenario

_BUDGETS = (10, 25, 50, 100, 200)


@pytest.mark.parametrize(
    ("rmse", "expected", "extrapolated"),
    [
        # RMSE = 1/sqrt(M) exactly: the interpolation must invert it, M = 1/rmse^2.
        (1 / math.sqrt(50), 50.0, False),  # a measured point
        (1 / math.sqrt(40), 40.0, False),  # between 25 and 50, log-log linear is exact
        (1 / math.sqrt(150), 150.0, False),
        # Beyond M = 200: 200 * (RMSE_200 / rmse)^2 = 200 * (0.0707107 / 0.05)^2 = 400.
        (0.05, 400.0, True),
        # Worse than i.i.d. at M = 10: 10 * (0.316228 / 0.5)^2 = 4.
        (0.5, 4.0, True),
    ],
)
def test_equivalent_labels_inverts_a_square_root_curve(
    rmse: float, expected: float, extrapolated: bool
) -> None:
    curve = [1 / math.sqrt(m) for m in _BUDGETS]
    labels, flag = equivalent_iid_labels(rmse, _BUDGETS, curve)
    assert labels == pytest.approx(expected, rel=1e-9)
    assert flag is extrapolated


def test_equivalent_labels_hand_computed_between_uneven_points() -> None:
    # Hand computation: between (25, 0.2) and (100, 0.08) in log-log, rmse 0.1 sits at
    # t = ln(0.1/0.2) / ln(0.08/0.2) = 0.756471; labels = exp(ln 25 + t ln 4) = 71.35.
    labels, flag = equivalent_iid_labels(0.1, (25, 100), (0.2, 0.08))
    assert labels == pytest.approx(25 * 4 ** (math.log(0.5) / math.log(0.4)), rel=1e-12)
    assert labels == pytest.approx(71.35, abs=0.01)
    assert flag is False


def test_equivalent_labels_uses_running_minimum_of_a_noisy_curve() -> None:
    # A curve that goes up between 50 and 100 (Monte-Carlo noise) is flattened to its
    # running minimum, so 0.1 maps to the first budget reaching it.
    labels, _ = equivalent_iid_labels(0.1, (25, 50, 100), (0.2, 0.1, 0.12))
    assert labels == pytest.approx(50.0)


def test_repetition_runs_every_method_on_a_tiny_scenario() -> None:
    scenario = build_scenario("breast_cancer", quick=True)
    config = HarnessConfig(budgets=(10, 20, 40), refit_at=(10, 20, 40), batch_size=5)
    result = run_repetition(scenario, 0, config)
    assert result.estimate.shape == (len(METHODS), 3)
    assert np.all(np.isfinite(result.estimate))
    assert np.all(result.lower <= result.upper)
    # Same seed, same result: each repetition owns its Generator.
    again = run_repetition(scenario, 0, config)
    np.testing.assert_array_equal(result.estimate, again.estimate)
    summary = summarize(scenario, [result, again], config)
    assert summary.cost.shape == (len(METHODS), 3)


def test_an_experiments_usefulness_hook_keeps_the_run_valid() -> None:
    # An experiment replaces only the predictable proposal of leadline's and the gate's
    # runs, so every method still yields finite estimates inside their intervals'
    # ordering; the rule travels to workers pickled (a partial of a module function).
    import pickle

    from benchmarks.experiments.variants import USEFULNESS_RULES

    rule = USEFULNESS_RULES["mixture_0.01"]
    scenario = build_scenario("breast_cancer", quick=True)
    config = HarnessConfig(
        budgets=(10, 20, 40), refit_at=(10, 20, 40), batch_size=5, usefulness=rule
    )
    assert pickle.loads(pickle.dumps(config)).usefulness.func is rule.func
    result = run_repetition(scenario, 1, config)
    assert np.all(np.isfinite(result.estimate))
    assert np.all(result.lower <= result.upper)


def test_quick_command_writes_a_report(tmp_path: Path) -> None:
    output = tmp_path / "quick.md"
    code = main(
        [
            "--quick",
            "--scenarios",
            "breast_cancer",
            "--repetitions",
            "3",
            "--workers",
            "1",
            "--output",
            str(output),
        ]
    )
    assert code == 0
    text = output.read_text()
    assert "QUICK mode" in text
    assert "breast_cancer" in text
    assert "| target | measured | met |" in text
