"""Smoke test of the draw micro-benchmark: on a small pool both paths draw the same items
and the index's ranges are never narrower than draw_batch's exact ones."""

from __future__ import annotations

from benchmarks.draws import measure


def test_draw_benchmark_reports_identical_draws_and_wider_or_equal_ranges():
    row = measure(5_000, calls=6, batch_calls=4)
    assert row["same draws"] == "4 / 4"
    assert row["calls"] == "4 / 6"
    for key in ("range width ratio high (median / max)", "range width ratio low (median / max)"):
        median, _, largest = row[key].partition(" / ")
        assert 1.0 <= float(median) <= float(largest)
