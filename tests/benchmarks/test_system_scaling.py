"""Smoke test of the scaling table and the mixed-load run: a tiny pool against a real
``leadline serve`` child; every figure is measured (no placeholder) and every RPC of the
mixed load answered."""

from __future__ import annotations

import math
from pathlib import Path

from benchmarks.system_scaling import (
    ScalingConfig,
    format_mixed_table,
    format_scaling_table,
    run_scaling,
)


def test_scaling_and_mixed_load_against_a_real_server(tmp_path: Path) -> None:
    config = ScalingConfig(sizes=(4_000,), main_size=4_000, label_seconds=3.0, mixed_seconds=2.0)
    results, mixed = run_scaling(config, tmp_path, lambda _message: None)
    (result,) = results
    assert result.items == 4_000
    assert result.labels >= 10
    assert result.labels % 10 == 0
    assert len(result.acquire) == len(result.noop) == len(result.commit) == result.labels // 10
    assert result.estimate
    assert result.gate
    assert result.refits >= 1  # the default cadence refits a small pool every 10 labels
    assert 0 < result.refit_cpu_share < 1
    assert len(result.lag) == len(result.acquire)
    assert min(result.lag) >= 0
    for value in (
        result.ingest_rate,
        result.bare_insert_rate,
        result.refit_seconds,
        result.bare_fit_seconds,
        result.bare_score_seconds,
        result.bytes_per_item,
    ):
        assert math.isfinite(value)
        assert value > 0
    assert result.raw_bytes_per_item == 4 * (32 + 10)
    assert {(row.method, row.role) for row in mixed} == {
        ("IngestItems", "ingest"),
        ("AcquireItems", "label"),
        ("SubmitLabels", "label"),
        ("CheckGate", "gate"),
        ("GetEstimate", "gate"),
    }
    assert all(row.samples for row in mixed)
    table = format_scaling_table(results)
    assert "| AcquireItems(10), median / p95 ms |" in table
    assert "4,000 items" in table
    assert "nan" not in table
    assert "| IngestItems | ingest |" in format_mixed_table(mixed)
