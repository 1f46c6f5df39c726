"""Shared fixtures: one real leadline server child for the module's tests, a seeded pool.

The server is started exactly as operators start it (``leadline serve``, see
leadline.client.LocalServer) with the sample config from deploy/, so these tests also
prove that the sample config is accepted.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.tree import DecisionTreeClassifier

from leadline.client import Client, LocalServer

ROOT = Path(__file__).resolve().parents[2]
SAMPLE_CONFIG = ROOT / "deploy" / "leadline.toml"
TOKENS = {
    "admin": "test-admin-token",
    "ingest": "test-ingest-token",
    "labeler": "test-labeler-token",
    "reader": "test-reader-token",
}
ALL_ROLES_TOKEN = "test-all-roles-token"


@dataclass(frozen=True)
class Digits:
    """A pool built from scikit-learn's bundled digits with a deliberately weak model."""

    pool: str
    item_ids: list[str]
    features: np.ndarray
    probabilities: np.ndarray
    labels: np.ndarray
    segments: list[str]

    @property
    def true_risk(self) -> float:
        return float(np.mean(self.probabilities.argmax(axis=1) != self.labels))


def digits_pool(pool: str = "digits") -> Digits:
    features, labels = load_digits(return_X_y=True)
    # A depth-4 tree trained on the first 600 images: wrong on about 40% of the rest.
    model = DecisionTreeClassifier(max_depth=4, random_state=0).fit(features[:600], labels[:600])
    probabilities = model.predict_proba(features[600:]).astype(np.float32)
    n = len(probabilities)
    return Digits(
        pool=pool,
        item_ids=[f"digit-{i:04d}" for i in range(n)],
        features=features[600:].astype(np.float32),
        probabilities=probabilities,
        labels=labels[600:].astype(np.int64),
        segments=["scanner-a" if i % 3 else "scanner-b" for i in range(n)],
    )


def label_rounds(
    client: Client, data: Digits, *, rounds: int, per_round: int, labeler: str = "vendor"
) -> int:
    """Acquire and label ``rounds`` x ``per_round`` items with their true labels."""
    index = {item_id: i for i, item_id in enumerate(data.item_ids)}
    labeled = 0
    for _ in range(rounds):
        assignments = client.acquire(data.pool, per_round, labeler=labeler)
        answers = {a.assignment_id: int(data.labels[index[a.item_id]]) for a in assignments}
        reply = client.submit_labels(data.pool, answers, labeler=labeler)
        assert not reply.errors, reply.errors
        labeled += reply.accepted
    return labeled


def wait_for_quiet_surrogate(
    client: Client, pool: str, *, quiet: float = 1.5, timeout: float = 60.0
) -> int:
    """Wait until background refits stop (the surrogate version holds for ``quiet`` s).

    Tests that compare two reads of an estimate need the surrogate not to change between
    them; refits start after every few labels and finish on their own time.
    """
    deadline = time.monotonic() + timeout
    version, since = client.get_pool(pool).surrogate_version, time.monotonic()
    while time.monotonic() < deadline:
        time.sleep(0.25)
        current = client.get_pool(pool).surrogate_version
        if current != version:
            version, since = current, time.monotonic()
        elif time.monotonic() - since >= quiet:
            return version
    raise AssertionError(f"surrogate of {pool} still changing after {timeout} s")


@pytest.fixture(scope="session")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalServer]:
    tokens = {token: [role] for role, token in TOKENS.items()}
    tokens[ALL_ROLES_TOKEN] = list(TOKENS)
    local = LocalServer(
        tmp_path_factory.mktemp("server"),
        tokens=tokens,
        extra_args=["--config", str(SAMPLE_CONFIG)],
    )
    local.start()
    try:
        yield local
    finally:
        code = local.stop()
        assert code == 0, f"server exited with {code}; log:\n{local.log()[-3000:]}"


@pytest.fixture(scope="session")
def admin(server: LocalServer) -> Iterator[Client]:
    with Client(server.target, token=ALL_ROLES_TOKEN) as client:
        yield client


@pytest.fixture(scope="session")
def labeled_digits(admin: Client) -> Digits:
    """The digits pool, ingested with segments, with 200 labels from the true labels."""
    data = digits_pool()
    admin.create_pool(
        data.pool,
        task="classification",
        num_classes=10,
        feature_dim=64,
        loss="zero-one",
        description="digits with a depth-4 tree",
    )
    admin.ingest(
        data.pool, data.item_ids, data.features, data.probabilities, segments=data.segments
    )
    label_rounds(admin, data, rounds=8, per_round=25)
    wait_for_quiet_surrogate(admin, data.pool)
    return data


def run_cli(
    *args: str, token: str | None = None, target: str = "", timeout: float = 60.0
) -> subprocess.CompletedProcess[str]:
    """Run ``python -m leadline.client.cli`` as a child, as a CI job would run `leadline`."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
    if token is not None:
        env["LEADLINE_TOKEN"] = token
    if target:
        env["LEADLINE_TARGET"] = target
    return subprocess.run(
        [sys.executable, "-m", "leadline.client.cli", *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=timeout,
        check=False,
    )
