"""Selection: draw probabilities, without-replacement law, per-draw ranges, speed, validation."""

from __future__ import annotations

import itertools
import re
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from leadline.service.estimation import (
    DEFAULT_FLOOR,
    SurrogateScores,
    draw_batch,
    selection_probabilities,
    usefulness,
)


def _sequence_probability(u: np.ndarray, sequence: tuple[int, ...], floor: float) -> float:
    """Probability of an ordered draw sequence under the documented mixture, by hand."""
    remaining = list(range(u.shape[0]))
    probability = 1.0
    for item in sequence:
        weights = u[remaining]
        q = (1 - floor) * weights / weights.sum() + floor / len(remaining)
        probability *= q[remaining.index(item)]
        remaining.remove(item)
    return probability


def test_usefulness_is_sqrt_of_residual_second_moment():
    scores = SurrogateScores(
        expected_loss=np.array([0.1, 0.5]),
        residual_second_moment=np.array([0.09, 0.25]),
        spread=np.zeros(2),
    )
    np.testing.assert_allclose(usefulness(scores), [0.3, 0.5])


def test_default_floor_is_in_the_documented_range():
    assert 0.1 <= DEFAULT_FLOOR <= 0.3


def test_logged_probabilities_follow_the_mixture_formula():
    rng = np.random.default_rng(5)
    u = rng.gamma(0.5, size=40)
    g = rng.uniform(0, 1, size=40)
    batch = draw_batch(u, g, 12, floor=0.15, loss_bound=1.0, rng=rng)
    assert len(set(batch.positions.tolist())) == 12
    remaining = list(range(40))
    for m, item in enumerate(batch.positions):
        q = (1 - 0.15) * u[remaining] / u[remaining].sum() + 0.15 / len(remaining)
        assert batch.probabilities[m] == pytest.approx(q[remaining.index(item)], rel=1e-12)
        assert batch.remaining_counts[m] == len(remaining)
        assert batch.remaining_expected_loss[m] == pytest.approx(g[remaining].sum(), rel=1e-12)
        assert batch.correction_high[m] >= np.max((1 - g[remaining]) / q) * (1 - 1e-12)
        assert batch.correction_low[m] <= np.min(-g[remaining] / q) * (1 - 1e-12)
        assert batch.min_probability[m] <= q.min() * (1 + 1e-12)
        remaining.remove(item)


def test_ordered_pairs_follow_the_sequential_law():
    """Chi-square goodness of fit of 3 000 batches of 2 draws against the exact law."""
    rng = np.random.default_rng(11)
    u = np.array([0.0, 1.0, 2.0, 3.0, 0.5])
    g = np.full(5, 0.3)
    pairs = list(itertools.permutations(range(5), 2))
    expected = np.array([_sequence_probability(u, pair, 0.3) for pair in pairs])
    assert expected.sum() == pytest.approx(1.0, abs=1e-12)
    counts = dict.fromkeys(pairs, 0)
    reps = 3000
    for _ in range(reps):
        batch = draw_batch(u, g, 2, floor=0.3, loss_bound=1.0, rng=rng)
        counts[tuple(batch.positions.tolist())] += 1
    observed = np.array([counts[pair] for pair in pairs])
    # Source: Pearson's chi-square test (scipy.stats.chisquare); a correct sampler fails
    # this at level 1e-3 once in a thousand seeds, and this seed is fixed.
    assert stats.chisquare(observed, reps * expected).pvalue > 1e-3


def test_zero_usefulness_everywhere_draws_uniformly():
    rng = np.random.default_rng(2)
    batch = draw_batch(np.zeros(10), np.full(10, 0.5), 4, floor=0.2, loss_bound=1.0, rng=rng)
    np.testing.assert_allclose(batch.probabilities, 1.0 / np.array([10, 9, 8, 7]))


def test_a_full_batch_drains_the_candidates():
    rng = np.random.default_rng(4)
    u = np.array([5.0, 0.0, 0.0, 1e-9])
    batch = draw_batch(u, np.zeros(4), 4, floor=0.1, loss_bound=1.0, rng=rng)
    assert sorted(batch.positions.tolist()) == [0, 1, 2, 3]
    assert batch.probabilities[-1] == pytest.approx(1.0)


def test_group_sums_track_the_remaining_set():
    rng = np.random.default_rng(8)
    g = rng.uniform(0, 1, size=30)
    groups = rng.integers(0, 3, size=30)
    batch = draw_batch(
        np.ones(30), g, 6, floor=0.2, loss_bound=1.0, rng=rng, groups=groups, num_groups=3
    )
    assert batch.remaining_expected_loss_by_group is not None
    left = np.ones(30, dtype=bool)
    for m, item in enumerate(batch.positions):
        for code in range(3):
            want = g[left & (groups == code)].sum()
            assert batch.remaining_expected_loss_by_group[m, code] == pytest.approx(want)
        left[item] = False


def test_selection_probabilities_sum_to_one_and_respect_the_floor():
    u = np.array([0.0, 1.0, 4.0])
    q = selection_probabilities(u, floor=0.3)
    assert q.sum() == pytest.approx(1.0)
    assert q.min() == pytest.approx(0.1)


def test_one_million_candidates_draw_a_batch_of_100_well_under_a_second():
    rng = np.random.default_rng(0)
    g = rng.beta(1.0, 8.0, size=1_000_000)
    u = np.sqrt(g * (1 - g))
    draw_batch(u, g, 100, floor=0.2, loss_bound=1.0, rng=rng)  # warm up
    start = time.perf_counter()
    batch = draw_batch(u, g, 100, floor=0.2, loss_bound=1.0, rng=rng)
    elapsed = time.perf_counter() - start
    assert len(set(batch.positions.tolist())) == 100
    assert elapsed < 0.5, f"draw_batch took {elapsed:.3f}s on 1M candidates"


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"floor": 0.0}, "floor = 0.0: must be in (0, 1]"),
        ({"floor": 1.5}, "floor = 1.5: must be in (0, 1]"),
        ({"count": 11}, "count = 11: must be <= the number of candidates (10)"),
        ({"count": -1}, "count = -1: must be an integer >= 0"),
        ({"usefulness": np.r_[np.ones(9), np.nan]}, "usefulness[9] = nan: must be finite"),
        ({"usefulness": -np.ones(10)}, "usefulness[0] = -1.0: must be >= 0"),
        ({"expected_loss": np.ones(9)}, "expected_loss has 9 entries: must match usefulness"),
        ({"expected_loss": np.full(10, 2.0)}, "must lie in [0, 1.0]"),
        ({"loss_bound": float("inf")}, "loss_bound = inf: must be finite and > 0"),
        ({"groups": np.full(10, 3), "num_groups": 2}, "must be integer codes in [0, 2)"),
        ({"groups": np.full(10, 0.5), "num_groups": 2}, "must be integer codes in [0, 2)"),
        ({"groups": np.full(10, -1), "num_groups": 2}, "must be integer codes in [0, 2)"),
        ({"groups": np.r_[np.zeros(9), np.nan], "num_groups": 2}, "groups[9] = nan"),
    ],
)
def test_bad_draw_arguments_raise_value_error_naming_field_value_and_rule(kwargs, message):
    arguments = {
        "usefulness": np.ones(10),
        "expected_loss": np.full(10, 0.5),
        "count": 3,
        "floor": 0.2,
        "loss_bound": 1.0,
        "rng": np.random.default_rng(0),
    }
    arguments.update(kwargs)
    positional = [arguments.pop(k) for k in ("usefulness", "expected_loss", "count")]
    with pytest.raises(ValueError, match=re.escape(message)):
        draw_batch(*positional, **arguments)


@settings(max_examples=60, deadline=None)
@given(
    data=st.data(),
    n=st.integers(min_value=1, max_value=25),
    floor=st.floats(min_value=0.01, max_value=1.0),
)
def test_any_small_pool_logs_exact_probabilities_and_covering_ranges(data, n, floor):
    # Subnormal scores are flushed to 0 by draw_batch (and break this reference formula).
    u = np.array(
        data.draw(st.lists(st.floats(0.0, 10.0, allow_subnormal=False), min_size=n, max_size=n))
    )
    g = np.array(data.draw(st.lists(st.floats(0.0, 2.0), min_size=n, max_size=n)))
    count = data.draw(st.integers(min_value=0, max_value=n))
    rng = np.random.default_rng(data.draw(st.integers(0, 2**32 - 1)))
    batch = draw_batch(u, g, count, floor=floor, loss_bound=2.0, rng=rng)
    remaining = list(range(n))
    for m, item in enumerate(batch.positions):
        weights = u[remaining]
        if weights.sum() > 0:
            q = (1 - floor) * weights / weights.sum() + floor / len(remaining)
        else:
            q = np.full(len(remaining), 1.0 / len(remaining))
        assert batch.probabilities[m] == pytest.approx(q[remaining.index(item)], rel=1e-9)
        # The logged range covers every candidate's correction at this draw.
        assert batch.correction_high[m] >= np.max((2.0 - g[remaining]) / q) * (1 - 1e-9)
        assert batch.correction_low[m] <= np.min(-g[remaining] / q) * (1 - 1e-9)
        remaining.remove(int(item))
    assert sorted(set(batch.positions.tolist())) == sorted(batch.positions.tolist())


def test_own_reach_ranges_cover_every_possible_loss_and_are_narrower():
    # The betting confidence sequence needs each draw's correction inside a range known
    # before the draw ("Estimating means of bounded random variables by betting", JRSS-B
    # 2024). With max_deviation = sqrt(worst_squared_deviation) the logged range must still
    # contain (L - g)/q for every candidate and every label it could get, computed here
    # from scikit-learn's log_loss, and be no wider than the [0, B] range.
    from sklearn.metrics import log_loss

    from leadline.service.estimation import LossKind, LossSpec, cold_start_surrogate

    spec = LossSpec(kind=LossKind.CROSS_ENTROPY, num_classes=3)
    rng = np.random.default_rng(17)
    outputs = rng.dirichlet([0.3, 0.3, 0.3], size=30)
    outputs = np.clip(outputs, 1e-4, None)
    outputs /= outputs.sum(axis=1, keepdims=True)
    scores = cold_start_surrogate(spec).score(np.zeros((30, 1)), outputs)
    g = scores.expected_loss
    assert scores.worst_squared_deviation is not None
    reach = np.sqrt(scores.worst_squared_deviation)
    u = usefulness(scores, loss_bound=spec.bound)
    narrow = draw_batch(
        u, g, 12, floor=0.3, loss_bound=spec.bound, rng=np.random.default_rng(1),
        max_deviation=reach,
    )  # fmt: skip
    wide = draw_batch(u, g, 12, floor=0.3, loss_bound=spec.bound, rng=np.random.default_rng(1))
    np.testing.assert_array_equal(narrow.positions, wide.positions)
    losses = np.array(
        [[log_loss([y], outputs[j : j + 1], labels=[0, 1, 2]) for y in range(3)] for j in range(30)]
    )
    remaining = list(range(30))
    for m, item in enumerate(narrow.positions):
        q = selection_probabilities(u[remaining], floor=0.3)
        corrections = (losses[remaining] - g[remaining, None]) / q[:, None]
        assert corrections.max() <= narrow.correction_high[m] * (1 + 1e-9)
        assert corrections.min() >= narrow.correction_low[m] * (1 + 1e-9)
        assert narrow.correction_high[m] <= wide.correction_high[m]
        assert narrow.correction_low[m] >= wide.correction_low[m]
        remaining.remove(int(item))
    assert narrow.correction_high[0] < 0.6 * wide.correction_high[0]


def test_negative_max_deviation_is_rejected():
    with pytest.raises(ValueError, match=r"max_deviation\[1\] = -0.5: must be >= 0"):
        draw_batch(
            np.ones(3), np.full(3, 0.2), 1, floor=0.3, loss_bound=1.0,
            rng=np.random.default_rng(0), max_deviation=np.array([0.1, -0.5, 0.2]),
        )  # fmt: skip
