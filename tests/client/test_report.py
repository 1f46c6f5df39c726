"""Reports render from estimate messages into a PNG and a self-contained HTML page."""

from __future__ import annotations

import base64
import re
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest

from leadline.client import Estimate, GateResult
from leadline.client.report import ReportData, write_report
from leadline.v1 import leadline_pb2

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


def _message(labels: int, risk: float, half: float, **extra: object) -> leadline_pb2.Estimate:
    return leadline_pb2.Estimate(
        risk=risk,
        lower=risk - half,
        upper=risk + half,
        anytime_lower=risk - 1.5 * half,
        anytime_upper=risk + 1.5 * half,
        confidence=0.95,
        labels_used=labels,
        items_in_scope=1000,
        mode=leadline_pb2.ESTIMATOR_MODE_BALANCED,
        **extra,  # type: ignore[arg-type]
    )


def _estimate(labels: int, risk: float, half: float, **extra: object) -> Estimate:
    return Estimate.from_message(_message(labels, risk, half, **extra))


def _data(*, draws: int = 40, segments: bool = True) -> ReportData:
    rng = np.random.default_rng(1)
    pool = leadline_pb2.Pool(
        name="pools/demo",
        description="<script>alert(1)</script>",
        item_count=1000,
        labeled_count=draws,
        draw_count=draws,
        segments=["north", "south"] if segments else [],
    )
    draw_list = [
        leadline_pb2.Draw(
            draw_index=i,
            item_id=f"i{i}",
            selection_probability=float(rng.uniform(0.3, 3.0)) / (1000 - i),
            expected_loss=float(rng.uniform(0, 1)),
            status=leadline_pb2.DRAW_STATUS_LABELED if i % 7 else leadline_pb2.DRAW_STATUS_SKIPPED,
            remaining_count=1000 - i,
        )
        for i in range(draws)
    ]
    return ReportData(
        pool=pool,
        estimate=_estimate(draws, 0.2, 0.05),
        trace=[_estimate(k, 0.2 + 0.1 / k, 0.5 / np.sqrt(k)) for k in range(5, draws + 1, 5)],
        segments={"north": _estimate(20, 0.15, 0.08), "south": _estimate(20, 0.25, 0.09)}
        if segments
        else {},
        draws=draw_list,
        gate=GateResult.from_message(
            leadline_pb2.GateResult(
                verdict=leadline_pb2.VERDICT_UNDECIDED,
                estimate=_message(draws, 0.2, 0.04),
                reason="the bounds contain 0.22",
                bound=leadline_pb2.BOUND_KIND_ANYTIME,
                more_labels_hint=60,
            ),
            max_risk=0.22,
        ),
        max_risk=0.22,
        gate_trace=[_estimate(k, 0.2 + 0.1 / k, 0.4 / np.sqrt(k)) for k in range(5, draws + 1, 5)],
        reference_risk=0.205,
        reference_segment_risks={"north": 0.16, "south": 0.24},
    )


@pytest.mark.parametrize(
    "data",
    [_data(), _data(draws=0, segments=False)],
    ids=["with-draws-and-segments", "empty-pool"],
)
def test_report_writes_a_png_and_html_with_three_embedded_figures(
    tmp_path: Path, data: ReportData
) -> None:
    files = write_report(data, tmp_path / "out", stem="demo")
    assert files.png == tmp_path / "out" / "demo.png"
    image = matplotlib.image.imread(files.png)  # decodes the PNG: it really opens
    assert image.ndim == 3
    assert image.shape[0] > 200
    assert image.shape[1] > 600
    page = files.html.read_text(encoding="utf-8")
    embedded = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(embedded) == 3
    for encoded in embedded:
        assert base64.b64decode(encoded).startswith(_PNG_SIGNATURE)
    for title in (
        "Estimate and bounds vs labels used",
        "Per-segment estimates",
        "Selection probability vs surrogate expected loss",
    ):
        assert f"<h2>{title}</h2>" in page
    # Self-contained: no external resources.
    assert "http://" not in page
    assert "https://" not in page


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> str:
    files = write_report(_data(), tmp_path_factory.mktemp("report"))
    return files.html.read_text(encoding="utf-8")


def test_report_html_escapes_pool_text(page: str) -> None:
    assert "<script>" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page


def test_report_tables_list_whole_pool_and_each_segment(page: str) -> None:
    for scope, risk in (("whole pool", "0.2000"), ("north", "0.1500"), ("south", "0.2500")):
        assert f"<tr><td>{scope}</td><td>{risk}</td>" in page
    assert "Gate: UNDECIDED" in page
