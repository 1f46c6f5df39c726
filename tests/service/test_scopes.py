"""Estimates for the whole pool, a segment, a time window and both, over a real server."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import zero_one_loss

from leadline.service.engine.scopes import Scope, build_scope_inputs
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, classification_pool, item_batch

_POOL = "pools/scoped"
_T0 = 1_700_000_000_000
_N = 120


def _columns(n: int) -> tuple[list[str], list[int]]:
    segments = ["north" if i % 3 else "south" for i in range(n)]
    times = [_T0 + 60_000 * i for i in range(n)]
    return segments, times


_SCOPES = [
    ({}, lambda seg, _t: np.ones(len(seg), bool)),
    ({"segment": "south"}, lambda seg, _t: seg == "south"),
    (
        {"start_time_ms": _T0 + 60_000 * 30, "end_time_ms": _T0 + 60_000 * 90},
        lambda _seg, t: (t >= _T0 + 60_000 * 30) & (t < _T0 + 60_000 * 90),
    ),
    (
        {"segment": "north", "start_time_ms": _T0 + 60_000 * 50},
        lambda seg, t: (seg == "north") & (t >= _T0 + 60_000 * 50),
    ),
]


@pytest.fixture
def scoped(harness: Harness, cancer_pool: Dataset) -> Harness:
    segments, times = _columns(_N)
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("scoped", cancer_pool))
        stubs.call(
            stubs.ingest.IngestItems,
            item_batch("scoped", cancer_pool, range(_N), segments=segments, event_time_ms=times),
        )
    return harness


def test_fully_labeled_pool_gives_exact_scope_risks(scoped: Harness, cancer_pool: Dataset) -> None:
    data = cancer_pool
    index = {item_id: i for i, item_id in enumerate(data.ids)}
    with scoped.stubs() as stubs:
        for _ in range(3):
            held = stubs.call(
                stubs.labeling.AcquireItems,
                pb.AcquireItemsRequest(pool=_POOL, count=40, labeler="vendor-a"),
            ).assignments
            stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL,
                    labeler="vendor-a",
                    labels=[
                        pb.LabelSubmission(
                            assignment_id=a.assignment_id,
                            class_label=int(data.labels[index[a.item_id]]),
                        )
                        for a in held
                    ],
                ),
            )
        segments, times = (np.array(c) for c in _columns(_N))
        predicted = data.outputs[:_N].argmax(axis=1)
        modes = (
            pb.ESTIMATOR_MODE_SURROGATE,
            pb.ESTIMATOR_MODE_UNBIASED,
            pb.ESTIMATOR_MODE_BALANCED,
        )
        for scope, select in _SCOPES:
            mask = select(segments, times)
            # Every item is labeled (a census), so every mode returns the exact scope risk
            # (scikit-learn's zero_one_loss) and both intervals collapse onto it.
            truth = zero_one_loss(data.labels[:_N][mask], predicted[mask])
            for mode in modes:
                estimate = stubs.call(
                    stubs.estimates.GetEstimate,
                    pb.GetEstimateRequest(pool=_POOL, mode=mode, **scope),
                )
                assert estimate.items_in_scope == int(mask.sum())
                assert estimate.labels_used == int(mask.sum())
                for value in (
                    estimate.risk,
                    estimate.lower,
                    estimate.upper,
                    estimate.anytime_lower,
                    estimate.anytime_upper,
                ):
                    assert value == pytest.approx(truth, abs=1e-9), (scope, mode)
                gate = stubs.call(
                    stubs.estimates.CheckGate,
                    pb.CheckGateRequest(
                        pool=_POOL, max_risk=truth + 0.01, bound=pb.BOUND_KIND_FIXED_TIME, **scope
                    ),
                )
                assert gate.verdict == pb.VERDICT_PASS, (scope, gate.reason)


def test_window_terms_follow_the_definition(scoped: Harness, cancer_pool: Dataset) -> None:
    """remaining_expected_loss[m] = sum of g0 over in-scope items present at draw m and not
    drawn before m (docs/core-api.md, DrawTerms); late terms cover items that came later."""
    with scoped.stubs() as stubs:
        stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=7, labeler="vendor-a"),
        )
        segments, times = _columns(30)
        extra = item_batch(
            "scoped", cancer_pool, range(_N, _N + 30), segments=segments, event_time_ms=times
        )
        stubs.call(stubs.ingest.IngestItems, extra)
        stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=5, labeler="vendor-a"),
        )
    assert scoped.server is not None
    pool = scoped.server.engine.pool("scoped")
    with pool.lock:
        scope = Scope(
            segment="north", start_time_ms=_T0 + 60_000 * 10, end_time_ms=_T0 + 60_000 * 80
        )
        inputs = build_scope_inputs(pool, scope)
        data = pool.data
        g0 = data.g0.view.copy()
        names = np.array(data.segment_names)[data.segment.view]
        t = data.event_time_ms.view.copy()
        rows = data.draws.row.view.copy()
        marks = data.draws.arrival_mark.view.copy()
    in_scope = (names == "north") & (t >= scope.start_time_ms) & (t < scope.end_time_ms)
    assert marks.tolist() == [_N] * 7 + [_N + 30] * 5
    for m in range(rows.shape[0]):
        drawn_before = set(rows[:m].tolist())
        remaining = sum(g0[j] for j in range(marks[m]) if in_scope[j] and j not in drawn_before)
        late = [j for j in range(marks[m], len(g0)) if in_scope[j]]
        assert inputs.terms.remaining_expected_loss[m] == pytest.approx(remaining, rel=1e-12)
        assert inputs.terms.late_count[m] == len(late)
        assert inputs.terms.late_expected_loss[m] == pytest.approx(sum(g0[late]), rel=1e-12)
        assert inputs.terms.expected_loss[m] == g0[rows[m]]
        assert bool(inputs.terms.in_scope[m]) == bool(in_scope[rows[m]])
    assert inputs.items_in_scope == int(in_scope.sum())
    assert inputs.items_unreached == 0


@pytest.mark.parametrize(
    "scope", [s for s, _ in _SCOPES], ids=["pool", "segment", "window", "both"]
)
def test_scope_estimate_before_any_draw_is_surrogate_only(scoped: Harness, scope: dict) -> None:
    with scoped.stubs() as stubs:
        estimate = stubs.call(
            stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL, **scope)
        )
        gate = stubs.call(
            stubs.estimates.CheckGate, pb.CheckGateRequest(pool=_POOL, max_risk=0.5, **scope)
        )
    assert estimate.labels_used == 0
    assert estimate.items_unreached == estimate.items_in_scope > 0
    assert gate.verdict == pb.VERDICT_UNDECIDED
