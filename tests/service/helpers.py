"""Fixtures: a real server on port 0 over a real SQLite data dir, stubs with tokens, data.

Data comes from scikit-learn's bundled datasets (load_digits, load_breast_cancer), with a
deliberately weak logistic-regression model as "the deployed model", so the pool has a
risk worth measuring.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import grpc
import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_digits
from sklearn.linear_model import LogisticRegression

from leadline.service.config import ServerConfig
from leadline.service.server import RunningServer, start_server
from leadline.v1 import leadline_pb2 as pb
from leadline.v1 import leadline_pb2_grpc as pb_grpc

TOKENS = {
    "admin": "admin-token-0001",
    "ingest": "ingest-token-0001",
    "labeler": "labeler-token-001",
    "labeler2": "labeler-token-002",
    "reader": "reader-token-0001",
    "ops": "ops-token-000001",
}
_TOKEN_ROLES = {
    "admin": ["admin"],
    "ingest": ["ingest"],
    "labeler": ["labeler"],
    "labeler2": ["labeler"],
    "reader": ["reader"],
    "ops": ["admin", "ingest", "labeler", "reader"],
}


def write_tokens(path: Path) -> Path:
    lines = ["[tokens]"]
    for name, token in TOKENS.items():
        roles = ", ".join(f'"{role}"' for role in _TOKEN_ROLES[name])
        lines.append(f'"{token}" = [{roles}]')
    path.write_text("\n".join(lines) + "\n")
    path.chmod(0o600)  # the server refuses a token file other users can read
    return path


def metadata(who: str) -> tuple[tuple[str, str], ...]:
    return (("authorization", f"Bearer {TOKENS[who]}"),)


@dataclass
class Stubs:
    """The four service stubs on one channel, calling with one token."""

    channel: grpc.Channel
    who: str

    def __post_init__(self) -> None:
        self.pools = pb_grpc.PoolServiceStub(self.channel)
        self.ingest = pb_grpc.IngestServiceStub(self.channel)
        self.labeling = pb_grpc.LabelingServiceStub(self.channel)
        self.estimates = pb_grpc.EstimateServiceStub(self.channel)

    def call(self, method: Callable[..., Any], request: Any, who: str | None = None) -> Any:
        return method(request, metadata=metadata(who or self.who), timeout=30)


@dataclass
class Harness:
    """Starts / restarts a server over one data dir; hands out stubs."""

    data_dir: Path
    tokens: Path
    settings: dict[str, Any]
    server: RunningServer | None = None

    def start(self) -> RunningServer:
        config = ServerConfig(
            data_dir=self.data_dir,
            listen="127.0.0.1:0",
            tokens=self.tokens,
            **self.settings,
        )
        self.server = start_server(config)
        return self.server

    def stop(self) -> None:
        if self.server is not None:
            self.server.stop(grace=2.0)
            self.server = None

    def channel(self) -> grpc.Channel:
        assert self.server is not None
        return grpc.insecure_channel(f"127.0.0.1:{self.server.port}")

    @contextlib.contextmanager
    def stubs(self, who: str = "ops") -> Iterator[Stubs]:
        channel = self.channel()
        try:
            yield Stubs(channel, who)
        finally:
            channel.close()


@pytest.fixture
def harness_factory(tmp_path: Path) -> Iterator[Callable[..., Harness]]:
    made: list[Harness] = []

    def make(**settings: Any) -> Harness:
        harness = Harness(
            data_dir=tmp_path / f"data{len(made)}",
            tokens=write_tokens(tmp_path / "tokens.toml"),
            settings=settings,
        )
        harness.start()
        made.append(harness)
        return harness

    yield make
    for harness in made:
        harness.stop()


@pytest.fixture
def harness(harness_factory: Callable[..., Harness]) -> Harness:
    return harness_factory()


@dataclass(frozen=True)
class Dataset:
    """A pool's worth of items: features, the model's outputs, the true labels."""

    ids: list[str]
    features: np.ndarray
    outputs: np.ndarray
    labels: np.ndarray
    num_classes: int


def _weak_model(x_train: np.ndarray, y_train: np.ndarray) -> LogisticRegression:
    model = LogisticRegression(C=0.05, max_iter=2000)
    model.fit(x_train, y_train)
    return model


@pytest.fixture(scope="session")
def digits_pool() -> Dataset:
    """2,000 items from sklearn's load_digits (1,797 images plus 203 noisy repeats)."""
    digits = load_digits()
    x = digits.data.astype(np.float64) / 16.0
    y = digits.target.astype(np.int64)
    rng = np.random.default_rng(7)
    extra = rng.choice(x.shape[0], size=2000 - x.shape[0], replace=False)
    x_pool = np.vstack([x, np.clip(x[extra] + rng.normal(0, 0.15, (extra.shape[0], 64)), 0, 1)])
    y_pool = np.concatenate([y, y[extra]])
    train = rng.choice(x.shape[0], size=150, replace=False)
    model = _weak_model(x[train], y[train])
    outputs = model.predict_proba(x_pool).astype(np.float32)
    outputs /= outputs.sum(axis=1, keepdims=True)
    return Dataset(
        ids=[f"digit-{i:05d}" for i in range(x_pool.shape[0])],
        features=x_pool.astype(np.float32),
        outputs=outputs,
        labels=y_pool,
        num_classes=10,
    )


@pytest.fixture(scope="session")
def cancer_pool() -> Dataset:
    """569 items from sklearn's load_breast_cancer, binary."""
    data = load_breast_cancer()
    x = (data.data - data.data.mean(axis=0)) / data.data.std(axis=0)
    y = data.target.astype(np.int64)
    rng = np.random.default_rng(11)
    train = rng.choice(x.shape[0], size=40, replace=False)
    model = _weak_model(x[train][:, :5], y[train])
    outputs = model.predict_proba(x[:, :5]).astype(np.float32)
    outputs /= outputs.sum(axis=1, keepdims=True)
    return Dataset(
        ids=[f"tumour-{i:04d}" for i in range(x.shape[0])],
        features=x.astype(np.float32),
        outputs=outputs,
        labels=y,
        num_classes=2,
    )


def classification_pool(pool_id: str, dataset: Dataset, **fields: Any) -> pb.CreatePoolRequest:
    pool = pb.Pool(
        task=pb.TASK_TYPE_CLASSIFICATION,
        num_classes=dataset.num_classes,
        feature_dim=dataset.features.shape[1],
        loss=pb.LOSS_KIND_ZERO_ONE,
        **fields,
    )
    return pb.CreatePoolRequest(pool_id=pool_id, pool=pool)


def item_batch(
    pool_id: str, dataset: Dataset, rows: np.ndarray | range, **columns: Any
) -> pb.ItemBatch:
    rows = np.asarray(rows)
    return pb.ItemBatch(
        pool=f"pools/{pool_id}",
        item_ids=[dataset.ids[r] for r in rows],
        features=dataset.features[rows].ravel().tolist(),
        model_outputs=dataset.outputs[rows].ravel().tolist(),
        **columns,
    )


def label_round(
    stubs: Stubs, pool_id: str, dataset: Dataset, count: int, *, labeler: str = "vendor-a"
) -> int:
    """Acquire ``count`` items and submit their true labels; returns how many were labeled."""
    index = {item_id: i for i, item_id in enumerate(dataset.ids)}
    response = stubs.call(
        stubs.labeling.AcquireItems,
        pb.AcquireItemsRequest(pool=f"pools/{pool_id}", count=count, labeler=labeler),
    )
    if not response.assignments:
        return 0
    submissions = [
        pb.LabelSubmission(
            assignment_id=a.assignment_id, class_label=int(dataset.labels[index[a.item_id]])
        )
        for a in response.assignments
    ]
    result = stubs.call(
        stubs.labeling.SubmitLabels,
        pb.SubmitLabelsRequest(pool=f"pools/{pool_id}", labeler=labeler, labels=submissions),
    )
    assert not result.errors, result.errors
    return int(result.accepted)


def wait_for_refits(stubs: Stubs, pool: str, labeled: int, *, min_version: int = 1) -> None:
    """Refits run in the background: wait until one covers every label (``labeled``), the
    surrogate is at least ``min_version``, and no further refit follows within 1.5 s."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        got = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=pool))
        if got.surrogate_version >= min_version and got.labeled_count == labeled:
            time.sleep(1.5)
            again = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=pool))
            if again.surrogate_version == got.surrogate_version:
                return
        time.sleep(0.2)
    raise AssertionError("refits did not settle within 60 s")
