"""A regression pool end to end (sklearn's load_diabetes, squared error)."""

from __future__ import annotations

import time

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import mean_squared_error

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Harness

_POOL = "pools/dose"


def test_regression_pool_full_loop(harness_factory) -> None:
    data = load_diabetes()
    x = data.data.astype(np.float32)
    y = data.target.astype(np.float64)
    model = Ridge(alpha=1.0).fit(x[:60], y[:60])
    predictions = model.predict(x).astype(np.float32)
    errors = (predictions.astype(np.float64) - y) ** 2
    cap = float(errors.max() * 2)  # no loss is clipped, so sklearn's MSE is the true risk
    harness: Harness = harness_factory(refit_every_labels=20, draw_seed=5)
    ids = [f"patient-{i:03d}" for i in range(x.shape[0])]
    index = {item_id: i for i, item_id in enumerate(ids)}
    with harness.stubs() as stubs:
        stubs.call(
            stubs.pools.CreatePool,
            pb.CreatePoolRequest(
                pool_id="dose",
                pool=pb.Pool(
                    task=pb.TASK_TYPE_REGRESSION,
                    feature_dim=x.shape[1],
                    loss=pb.LOSS_KIND_SQUARED_ERROR,
                    loss_cap=cap,
                ),
            ),
        )
        summary = stubs.call(
            stubs.ingest.IngestItems,
            pb.ItemBatch(
                pool=_POOL,
                item_ids=ids,
                features=x.ravel().tolist(),
                model_outputs=predictions.tolist(),
            ),
        )
        assert summary.accepted == x.shape[0]
        labeled = 0
        while True:
            held = stubs.call(
                stubs.labeling.AcquireItems,
                pb.AcquireItemsRequest(pool=_POOL, count=100, labeler="clinic"),
            ).assignments
            if not held:
                break
            reply = stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL,
                    labeler="clinic",
                    labels=[
                        pb.LabelSubmission(
                            assignment_id=a.assignment_id, value=float(y[index[a.item_id]])
                        )
                        for a in held
                    ],
                ),
            )
            labeled += reply.accepted
        assert labeled == x.shape[0]
        deadline = time.monotonic() + 60
        while stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL)).surrogate_version < 1:
            assert time.monotonic() < deadline, "no refit within 60 s"
            time.sleep(0.2)
        estimate = stubs.call(
            stubs.estimates.GetEstimate,
            pb.GetEstimateRequest(pool=_POOL, mode=pb.ESTIMATOR_MODE_SURROGATE),
        )
    # Every item labeled: the plug-in is the exact mean squared error (scikit-learn).
    truth = mean_squared_error(y, predictions.astype(np.float64))
    assert estimate.risk == pytest.approx(truth, rel=1e-9)
    assert estimate.loss_bound == pytest.approx(cap)
