"""Smoke test of the ingest and restart benchmark: one tiny size end to end against a real
``leadline serve`` child (ingest, a refit, a restart) beside the bare sqlite3 floors."""

from __future__ import annotations

from pathlib import Path

from benchmarks.ingest import SECTION, measure, render_section


def test_one_size_reports_ingest_restart_and_stages(tmp_path: Path) -> None:
    figures = measure(4_500, tmp_path / "run", say=lambda _text: None, profile_rows=4_000)
    ingest, restart = figures.ingest, figures.restart
    # 4,500 rows in 2,000-row batches: 2,000 + 2,000 + 500.
    assert len(ingest.leadline) == len(ingest.bare_chunks) == len(ingest.bare_rows) == 3
    assert all(seconds > 0 for seconds in ingest.leadline + ingest.bare_chunks)
    assert restart.items == 4_500
    assert restart.surrogate_version >= 1
    # The restart takes the refit's scores from the score file: scoring may round to 0.
    assert 0 <= restart.scoring <= restart.pool_load < restart.spawn_to_serving
    assert restart.bare_read > 0
    assert restart.bare_row_read > 0
    assert list(figures.stages) == [
        "client: build message",
        "serialise + parse",
        "validate",
        "score",
        "apply",
        "commit",
    ]
    body = render_section([figures], command="benchmarks/ingest.py --sizes 4500")
    assert body.startswith("## Ingest and restart\n")
    assert body.count("| 4,500 |") == 5
    assert SECTION == "ingest-restart"
