"""`leadline demo` end to end (smaller pool than `make demo`), with a truthful summary."""

from __future__ import annotations

import json
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from sklearn.metrics import zero_one_loss

from leadline.client.demo import DEPOTS, build_scenario

from .conftest import run_cli


def test_demo_runs_through_and_prints_the_true_risk_of_the_hidden_labels(tmp_path: Path) -> None:
    seed, items = 11, 2000
    done = run_cli(
        "demo",
        "--out",
        str(tmp_path),
        "--seed",
        str(seed),
        "--items",
        str(items),
        "--budget",
        "200",
        timeout=180,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    summary = json.loads((tmp_path / "summary.json").read_text())

    # The printed true risk is the model's misclassification rate on the scenario's hidden
    # labels, recomputed here with scikit-learn's zero_one_loss on a rebuilt scenario.
    scenario = build_scenario(seed=seed, items=items)
    truth = zero_one_loss(scenario.hidden_labels, scenario.probabilities.argmax(axis=1))
    assert summary["true_risk"] == pytest.approx(truth, abs=1e-12)
    assert f"true risk (hidden labels of all 2,000 items): {truth:.4f}" in done.stdout
    assert set(scenario.segments) == set(DEPOTS)
    np.testing.assert_allclose(scenario.probabilities.sum(axis=1), 1.0, atol=1e-5)

    # The rest of the summary is the server's view, printed as it came.
    assert summary["verdict"] in ("PASS", "FAIL", "UNDECIDED")
    assert f"gate: {summary['verdict']} (risk below 0.15 at 95%" in done.stdout
    assert 0 < summary["labels_used"] <= 200 + 20, done.stdout
    assert summary["lower"] <= summary["estimate"] <= summary["upper"]
    assert f"labels used: {summary['labels_used']} (plus" in done.stdout
    assert "random sampling would need about" in done.stdout
    # The validation split was uploaded first and taught the surrogate; the same traffic was
    # labeled again without it for the comparison.
    assert summary["validation_items"] == len(scenario.validation_labels) > 0
    assert summary["surrogate_version"] >= 1
    plain = summary["without_validation"]
    assert 0 < plain["labels_used"] <= 200 + 20
    assert f"without validation items: {plain['labels_used']} labels used" in done.stdout
    assert "the textbook sample-size formula for a proportion" in done.stdout
    assert "[" in done.stdout
    assert "/200 | est " in done.stdout
    # The gate line shows the bound the verdict used, labeled one-sided.
    assert "one-sided 95% anytime" in done.stdout
    assert "95% two-sided: fixed-time [" in done.stdout
    png, page = Path(summary["report_png"]), Path(summary["report_html"])
    assert png.parent == page.parent == tmp_path
    assert matplotlib.image.imread(png).ndim == 3
    assert page.read_text().count("data:image/png;base64,") == 3
    assert "leadline listening on 127.0.0.1:" in (tmp_path / "server.log").read_text()
