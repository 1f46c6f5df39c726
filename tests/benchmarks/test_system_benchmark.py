"""Smoke test of the system benchmark: the harness runs end to end against a real
``leadline serve`` child on a tiny pool and reports every row; ``replace_section`` changes
only its own section of a Markdown file."""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest

from benchmarks.markdown import end_marker, replace_section, start_marker
from benchmarks.system import (
    SECTION,
    SystemConfig,
    format_table,
    make_pool_data,
    render_section,
    run_system_benchmark,
)

_TINY = SystemConfig(
    items=3_000,
    acquire_calls=3,
    estimate_calls=3,
    refit_every_labels=40,
    refits=2,
)


def test_harness_reports_every_row_against_a_real_server(tmp_path: Path) -> None:
    report = run_system_benchmark(_TINY, tmp_path, progress=False)
    measurements = [row.measurement for row in report.rows]
    expected_prefixes = [
        "ingest, 2,000-row batches",
        "AcquireItems, count 10,",  # vs numpy
        "AcquireItems, count 10,",  # vs draw_batch
        "AcquireItems, count 100,",
        "AcquireItems, count 100,",
        "refit + rescoring of 3,000 items after 40 labels",
        "refit + rescoring of 3,000 items after 80 labels",
        "GetEstimate, whole pool, cached",
        "GetEstimate, whole pool, first after a change",
        "GetEstimate, segment 'hall-a', cached",
        "GetEstimate, segment 'hall-a', first after a change",
        "GetEstimate, time window (middle third), cached",
        "GetEstimate, time window (middle third), first after a change",
        "server resident memory per item after ingest",
        "... at the end",
    ]
    assert len(measurements) == len(expected_prefixes)
    for measurement, prefix in zip(measurements, expected_prefixes, strict=True):
        assert measurement.startswith(prefix), (measurement, prefix)
    baselines = [row.baseline_name for row in report.rows]
    assert baselines[1].startswith("numpy Generator.choice")
    assert baselines[2].startswith("core draw_batch alone")
    assert all(name.startswith("core estimate_risk") for name in baselines[7:13])
    for row in report.rows:
        assert math.isfinite(row.ratio), row
        assert row.baseline.value > 0, row
    # Rates and latencies are strictly positive. Resident-memory growth of a tiny pool
    # may be nothing beyond what the allocator already held, so only >= 0 is certain.
    assert all(row.leadline.value > 0 for row in report.rows[:13])
    assert all(row.leadline.value >= 0 for row in report.rows[13:])
    # The raw bytes per item are the float32 features + outputs: (32 + 10) * 4.
    assert report.rows[-1].baseline.value == (32 + 10) * 4
    assert report.wall_seconds > 0

    table = format_table(report.rows)
    assert table.count("\n") == len(report.rows) + 1  # header, rule, one line per row
    body = render_section(report, command="python benchmarks/system.py", quick=True)
    assert "- Command: `python benchmarks/system.py`" in body
    assert "nproc" in body
    assert "Wall time" in body
    assert "- Code: " in body
    assert table in body


def test_pool_data_is_deterministic_and_well_formed() -> None:
    first = make_pool_data(500, feature_dim=4, num_classes=3, seed=7)
    again = make_pool_data(500, feature_dim=4, num_classes=3, seed=7)
    assert first.item_ids == again.item_ids
    assert (first.features == again.features).all()
    assert (first.labels == again.labels).all()
    # The server refuses probability rows that do not sum to 1 within 1e-3 (operations.md).
    assert abs(first.outputs.sum(axis=1) - 1).max() < 1e-5
    assert first.labels.min() >= 0
    assert first.labels.max() <= 2
    assert first.row_of(first.item_ids[123]) == 123


_START, _END = start_marker(SECTION), end_marker(SECTION)


def test_replace_section_creates_missing_file_with_markers(tmp_path: Path) -> None:
    path = tmp_path / "BENCHMARKS.md"
    replace_section(path, SECTION, "table one")
    assert path.read_text() == f"{_START}\ntable one\n{_END}\n"


def test_replace_section_appends_markers_after_existing_text(tmp_path: Path) -> None:
    path = tmp_path / "BENCHMARKS.md"
    path.write_text("# Benchmarks\n\nlabel efficiency tables")  # no final newline
    replace_section(path, SECTION, "system table\n")
    assert path.read_text() == (
        f"# Benchmarks\n\nlabel efficiency tables\n\n{_START}\nsystem table\n{_END}\n"
    )


def test_replace_section_changes_only_its_own_section(tmp_path: Path) -> None:
    path = tmp_path / "BENCHMARKS.md"
    other_start, other_end = start_marker("labels"), end_marker("labels")
    before = f"# Title\r\n\n{other_start}\nlabels v1\n{other_end}\n\n"
    after = "\ntrailing text  \nwithout final newline"
    path.write_text(f"{before}{_START}\nold system\nlines\n{_END}{after}", newline="")
    replace_section(path, SECTION, "new system\n")
    assert path.read_bytes().decode() == f"{before}{_START}\nnew system\n{_END}{after}"
    replace_section(path, "labels", "labels v2")
    assert path.read_bytes().decode() == (
        f"# Title\r\n\n{other_start}\nlabels v2\n{other_end}\n\n{_START}\nnew system\n{_END}{after}"
    )


def test_replace_section_is_idempotent(tmp_path: Path) -> None:
    path = tmp_path / "BENCHMARKS.md"
    path.write_text("intro\n")
    replace_section(path, SECTION, "body")
    once = path.read_text()
    replace_section(path, SECTION, "body")
    assert path.read_text() == once


def test_replace_section_empty_body_keeps_markers(tmp_path: Path) -> None:
    path = tmp_path / "BENCHMARKS.md"
    path.write_text(f"a\n{_START}\nold\n{_END}\nb\n")
    replace_section(path, SECTION, "")
    assert path.read_text() == f"a\n{_START}\n{_END}\nb\n"


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        (f"{_START}\nonly a start\n", "1 start marker(s) at lines [1] and 0 end marker(s)"),
        (
            f"only an end\n{_END}\n",
            "0 start marker(s) at lines [] and 1 end marker(s) at lines [2]",
        ),
        (f"{_END}\n{_START}\n", "1 start marker(s) at lines [2] and 1 end marker(s) at lines [1]"),
        (f"{_START}\n{_END}\n{_START}\n{_END}\n", "2 start marker(s) at lines [1, 3]"),
    ],
)
def test_replace_section_refuses_broken_markers_and_leaves_file(
    tmp_path: Path, text: str, problem: str
) -> None:
    path = tmp_path / "BENCHMARKS.md"
    path.write_text(text)
    with pytest.raises(ValueError, match=re.escape(problem)):
        replace_section(path, SECTION, "new")
    assert path.read_text() == text


def test_replace_section_ignores_marker_text_inside_a_line(tmp_path: Path) -> None:
    # Only a marker alone on its line counts; a mention in prose is left alone.
    path = tmp_path / "BENCHMARKS.md"
    text = f"See `{_START}` in the docs.\n"
    path.write_text(text)
    replace_section(path, SECTION, "body")
    assert path.read_text() == f"{text}\n{_START}\nbody\n{_END}\n"


@pytest.mark.parametrize("name", ["", "has space", "-leading-dash", "x-->", "a:b"])
def test_replace_section_refuses_bad_names(tmp_path: Path, name: str) -> None:
    with pytest.raises(ValueError, match="name = "):
        replace_section(tmp_path / "B.md", name, "body")
    assert not (tmp_path / "B.md").exists()


def test_replace_section_refuses_body_with_its_markers(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="body contains a marker"):
        replace_section(tmp_path / "B.md", SECTION, f"x\n{_END}\ny")
