"""Validation items through the client and the `leadline` command, against a real server.

The rows are what a team would upload: out-of-fold outputs of its model on its training
data (scikit-learn's ``cross_val_predict`` on the bundled digits).
"""

from __future__ import annotations

import csv
import json
import time
from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.model_selection import cross_val_predict
from sklearn.tree import DecisionTreeClassifier

from leadline.client import Client, InvalidRequest, LocalServer
from leadline.client.export import read_draws_csv

from .conftest import ALL_ROLES_TOKEN, TOKENS, digits_pool, label_rounds, run_cli


@pytest.fixture(scope="module")
def training_rows() -> dict[str, np.ndarray]:
    """Out-of-fold outputs of the conftest's depth-4 tree on its 600 training images."""
    features, labels = load_digits(return_X_y=True)
    model = DecisionTreeClassifier(max_depth=4, random_state=0)
    outputs = cross_val_predict(model, features[:600], labels[:600], cv=5, method="predict_proba")
    return {
        "item_ids": np.array([f"train-{i:04d}" for i in range(600)]),
        "features": features[:600].astype(np.float32),
        "outputs": outputs.astype(np.float32),
        "labels": labels[:600].astype(np.int64),
    }


def _new_pool(admin: Client, pool: str) -> None:
    admin.create_pool(pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one")


def _wait_for_surrogate(client: Client, pool: str, validation: int, labels: int) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        info = client.get_pool(pool)
        if (info.surrogate_validation_count, info.surrogate_label_count) == (validation, labels):
            return
        time.sleep(0.2)
    raise AssertionError(f"no surrogate on {validation} validation items and {labels} labels")


def test_add_validation_is_batched_repeatable_and_checked_before_sending(
    server: LocalServer, training_rows: dict[str, np.ndarray]
) -> None:
    with Client(server.target, token=ALL_ROLES_TOKEN) as admin:
        _new_pool(admin, "batched-validation")
    with Client(server.target, token=TOKENS["ingest"], max_batch_rows=130) as client:
        rows = training_rows
        result = client.add_validation(
            "batched-validation",
            rows["item_ids"],
            rows["features"],
            rows["outputs"],
            rows["labels"].astype(float),  # whole numbers in a float array are fine
            request_id="nightly-export",
        )
        assert (result.accepted, result.duplicates, result.rejected) == (600, 0, 0)
        assert (result.item_count, result.messages) == (600, 5)  # ceil(600 / 130)
        # The same call again: every message is answered from its first result.
        again = client.add_validation(
            "batched-validation",
            rows["item_ids"],
            rows["features"],
            rows["outputs"],
            rows["labels"],
            request_id="nightly-export",
        )
        assert (again.accepted, again.item_count) == (600, 600)
        # Without the request id the server finds duplicates, nothing new.
        fresh = client.add_validation(
            "batched-validation",
            rows["item_ids"],
            rows["features"],
            rows["outputs"],
            rows["labels"],
        )
        assert (fresh.accepted, fresh.duplicates) == (0, 600)
        info = client.get_pool("batched-validation")
        assert (info.validation_count, info.item_count) == (600, 0)
        half = rows["labels"][:3] + 0.5
        with pytest.raises(InvalidRequest, match=r"labels\[0\] = 0.5: a classification pool"):
            client.add_validation(
                "batched-validation",
                rows["item_ids"][:3],
                rows["features"][:3],
                rows["outputs"][:3],
                half,
            )
        with pytest.raises(InvalidRequest, match=r"labels has shape \(2,\): must be \(3,\)"):
            client.add_validation(
                "batched-validation",
                rows["item_ids"][:3],
                rows["features"][:3],
                rows["outputs"][:3],
                rows["labels"][:2],
            )
        assert client.get_pool("batched-validation").validation_count == 600


def _write_csv(path: Path, rows: dict[str, np.ndarray], count: int) -> None:
    header = ["item_id", "label", "segment"]
    header += [f"feature_{i}" for i in range(64)] + [f"output_{i}" for i in range(10)]
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for i in range(count):
            writer.writerow(
                [rows["item_ids"][i], int(rows["labels"][i]), "scanner-a"]
                + [repr(float(v)) for v in rows["features"][i]]
                + [repr(float(v)) for v in rows["outputs"][i]]
            )


def test_cli_adds_validation_items_from_npz_and_csv_and_status_shows_them(
    server: LocalServer, tmp_path: Path, training_rows: dict[str, np.ndarray]
) -> None:
    data = digits_pool("cli-validation")
    with Client(server.target, token=ALL_ROLES_TOKEN) as admin:
        _new_pool(admin, data.pool)
        admin.ingest(data.pool, data.item_ids, data.features, data.probabilities)
    rows = training_rows
    npz = tmp_path / "rows.npz"
    np.savez(npz, **{k: v[:400] for k, v in rows.items()})
    done = run_cli(
        "validation",
        "add",
        "--pool",
        data.pool,
        "--file",
        str(npz),
        token=TOKENS["ingest"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith(
        "added 400 validation items to pools/cli-validation (0 duplicates, 0 rejected); "
        "the pool holds 400 validation items"
    )
    table = tmp_path / "rows.csv"
    _write_csv(table, {k: v[400:] for k, v in rows.items()}, 200)
    done = run_cli(
        "validation",
        "add",
        "--pool",
        data.pool,
        "--file",
        str(table),
        token=TOKENS["admin"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    assert "the pool holds 600 validation items" in done.stdout
    # A reader may not upload; a bad file is refused before anything is sent.
    refused = run_cli(
        "validation", "add", "--pool", data.pool, "--file", str(npz),
        token=TOKENS["reader"], target=server.target,
    )  # fmt: skip
    assert refused.returncode == 3
    assert "PERMISSION_DENIED" in refused.stderr
    np.savez(tmp_path / "bad.npz", item_ids=rows["item_ids"][:3], features=rows["features"][:3])
    bad = run_cli(
        "validation", "add", "--pool", data.pool, "--file", str(tmp_path / "bad.npz"),
        token=TOKENS["ingest"], target=server.target,
    )  # fmt: skip
    assert bad.returncode == 3
    assert "arrays ['outputs', 'labels'] missing" in bad.stderr
    with Client(server.target, token=ALL_ROLES_TOKEN) as client:
        _wait_for_surrogate(client, data.pool, 600, 0)
        label_rounds(client, data, rounds=1, per_round=20)
        _wait_for_surrogate(client, data.pool, 600, 20)
    status = run_cli("status", "--pool", data.pool, token=ALL_ROLES_TOKEN, target=server.target)
    assert status.returncode == 0, status.stderr
    lines = dict(line.split(None, 1) for line in status.stdout.splitlines() if line.strip())
    assert lines["surrogate"].endswith("fitted on 20 pool labels and 600 validation items")
    assert lines["validation"] == "600 items (teach the surrogate; never drawn or counted)"
    assert lines["items"] == f"{len(data.item_ids):,}"
    shown = json.loads(
        run_cli(
            "status", "--pool", data.pool, "--json", token=ALL_ROLES_TOKEN, target=server.target
        ).stdout
    )
    assert shown["pool"]["validation_count"] == 600  # plain numbers (README "JSON output")
    assert shown["estimate"]["items_in_scope"] == len(data.item_ids)
    # The export lists draws of pool items only.
    out = tmp_path / "draws.csv"
    done = run_cli(
        "export", "--pool", data.pool, "--out", str(out),
        token=TOKENS["reader"], target=server.target,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    exported = read_draws_csv(out)
    assert len(exported) == 20
    assert {d.item_id for d in exported} <= set(data.item_ids)


def test_validation_add_help_states_the_file_format() -> None:
    done = run_cli("validation", "add", "--help")
    assert done.returncode == 0
    for needed in ("item_ids", "features", "outputs", "labels", "allow_pickle=False", "csv"):
        assert needed in done.stdout
