"""The adaptive-floor experiment: its variance estimate, by enumeration, and which floor
it picks (the rule lives in benchmarks/experiments; the server does not use it).

Outside source for the estimate: reweighting draws made under one proposal q to another
q' gives E_q[r_I^2 / (q_I q'_I)] = sum_j r_j^2 / q'_j, the second moment an importance-
sampling term would have under q' ("Monte Carlo theory, methods and examples", 2013,
ch. 9). The rule built on it (pick the floor with the smallest estimate) is our own; the
behaviour tests pin what it must do at the two ends: follow a usefulness that tracks the
residuals, and move towards uniform draws when the usefulness points the wrong way.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks.experiments.adaptive_floor import (
    ADAPTIVE_FLOOR_MIN_DRAWS,
    FLOOR_STEPS,
    adaptive_floor,
    floor_costs,
)
from leadline.service.estimation import draw_batch, selection_probabilities


def test_floor_cost_estimate_is_unbiased_by_enumeration():
    # One draw from q (floor 0.3); averaging the one-draw estimate over every possible
    # drawn item, weighted by its probability, gives sum_j r_j^2 / q'_j exactly.
    u = np.array([0.1, 0.5, 2.0, 0.0, 1.2])
    r = np.array([0.3, -0.2, 1.5, 0.05, -0.9])
    n = u.shape[0]
    q = selection_probabilities(u, floor=0.3)
    for other in (0.1, 0.3, 0.5, 0.9):
        q_other = selection_probabilities(u, floor=other)
        per_item = [
            floor_costs(r[j : j + 1], q[j : j + 1], np.array([0.3]), np.array([n]), [other])[0]
            for j in range(n)
        ]
        assert float(np.dot(q, per_item)) == pytest.approx(float(np.sum(r**2 / q_other)))


def _history(u: np.ndarray, residual: np.ndarray, count: int, seed: int) -> tuple:
    batch = draw_batch(
        u, np.zeros(u.shape[0]), count, floor=0.3, loss_bound=1.0, rng=np.random.default_rng(seed)
    )
    floors = np.full(count, 0.3)
    return (
        residual[batch.positions],
        batch.probabilities,
        floors,
        batch.remaining_counts.astype(float),
    )


def test_a_usefulness_that_tracks_the_residuals_keeps_the_configured_floor():
    rng = np.random.default_rng(1)
    u = rng.gamma(0.5, size=2_000)
    residual = u * rng.choice([-1.0, 1.0], size=u.shape[0])  # |r| proportional to u
    assert adaptive_floor(*_history(u, residual, 60, seed=2), minimum=0.3) == 0.3


def test_a_usefulness_pointing_the_wrong_way_moves_towards_uniform():
    rng = np.random.default_rng(3)
    u = rng.gamma(0.5, size=2_000)
    residual = 1.0 / (1.0 + 20.0 * u)  # largest where the usefulness is smallest
    assert adaptive_floor(*_history(u, residual, 60, seed=4), minimum=0.3) == max(FLOOR_STEPS)


def test_too_few_draws_and_floor_one_draws_keep_the_minimum():
    rng = np.random.default_rng(5)
    u = rng.gamma(0.5, size=500)
    residual = 1.0 / (1.0 + 20.0 * u)
    r, q, floors, counts = _history(u, residual, ADAPTIVE_FLOOR_MIN_DRAWS - 1, seed=6)
    assert adaptive_floor(r, q, floors, counts, minimum=0.2) == 0.2
    r, q, floors, counts = _history(u, residual, 40, seed=7)
    # Draws made with floor 1 say nothing about the usefulness share: ignored.
    assert adaptive_floor(r, q, np.ones_like(floors), counts, minimum=0.2) == 0.2


def test_all_zero_residuals_keep_the_minimum():
    u = np.linspace(0.0, 1.0, 300)
    r, q, floors, counts = _history(u, np.zeros(300), 30, seed=8)
    assert adaptive_floor(r, q, floors, counts, minimum=0.3) == 0.3


@pytest.mark.parametrize(
    ("field", "value", "message"),
    [
        (
            "probabilities",
            np.array([0.0]),
            r"probabilities range \[0.0, 0.0\], must be in \(0, 1\]",
        ),
        ("floors", np.array([1.5]), r"floors range \[1.5, 1.5\], must be in \(0, 1\]"),
        ("remaining_counts", np.array([0.0]), r"remaining_counts min = 0.0, must be >= 1"),
        ("residuals", np.array([np.nan]), "residuals"),
        ("floors", np.array([0.3, 0.3]), "floors has 2 entries, must match residuals"),
    ],
)
def test_bad_input_names_the_field(field: str, value: np.ndarray, message: str):
    arrays = {
        "residuals": np.array([0.1]),
        "probabilities": np.array([0.01]),
        "floors": np.array([0.3]),
        "remaining_counts": np.array([100.0]),
    }
    arrays[field] = value
    with pytest.raises(ValueError, match=message):
        adaptive_floor(
            arrays["residuals"],
            arrays["probabilities"],
            arrays["floors"],
            arrays["remaining_counts"],
            minimum=0.3,
        )


def test_minimum_outside_unit_interval_is_rejected():
    with pytest.raises(ValueError, match="minimum"):
        adaptive_floor(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0), minimum=0.0)
