"""Draw micro-benchmark: the core's draw_batch (one O(N) pass per batch) beside the draw
index (sum trees, O(k log N) per batch) on the same pools, generators and candidates.

Run from the repository root:

    .venv/bin/python benchmarks/draws.py            # 100k, 1M and 10M items; BENCHMARKS.md
    .venv/bin/python benchmarks/draws.py --quick    # 100k and 1M items, prints only

Per pool size: the build time of the index (the core's ``DrawIndex.build`` from the
arrays, and the engine's ``ledger.build_index`` from surrogate scores: usefulness, control
variate and reach included, as a refit pays it), the time of one 10-item draw by each
path (median / p95 over repeated calls, each on the candidates left by the calls before),
the time to add 2,000 ingested items, whether both paths drew the same items with the
same probabilities, and how much wider the index's conservative correction ranges are
than draw_batch's exact ones (ratio of the ranges, median and max over the draws).

The pool is invented: gamma-distributed residual second moments (a few items much more
uncertain than most), expected losses in [0, 1] (zero-one loss), each item's reach from
its own loss table, four segments. Timings are wall-clock on a shared two-core machine:
compare the two columns of one run, not runs with each other.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

_ROOT = Path(__file__).resolve().parents[1]
if str(_ROOT) not in sys.path:  # run as a script: make `benchmarks` importable
    sys.path.insert(0, str(_ROOT))

from benchmarks.harness import HarnessConfig, run_repetition  # noqa: E402
from benchmarks.labels import surrogate_settings  # noqa: E402
from benchmarks.markdown import replace_section  # noqa: E402
from benchmarks.scenarios import QUICK_SCENARIO_NAMES, build_scenario  # noqa: E402
from leadline.service.engine.ledger import build_index  # noqa: E402
from leadline.service.estimation import (  # noqa: E402
    DEFAULT_FLOOR,
    DrawIndex,
    Reliance,
    SurrogateScores,
    draw_batch,
    usefulness,
)

_SECTION = "draw-index"
_COUNT = 10
_GROUPS = 4


def _scores(n: int, seed: int) -> tuple[SurrogateScores, np.ndarray]:
    rng = np.random.default_rng(seed)
    g = np.clip(rng.beta(0.6, 4.0, size=n), 0.0, 1.0)
    second = g * (1.0 - g) * rng.gamma(0.5, 2.0, size=n)
    second = np.minimum(second, np.maximum(g, 1.0 - g) ** 2)
    worst = np.maximum(g, 1.0 - g) ** 2
    groups = rng.integers(0, _GROUPS, size=n)
    return SurrogateScores(g, second, np.zeros(n), worst), groups


def _stats(seconds: list[float]) -> str:
    ms = np.asarray(seconds) * 1e3
    return f"{np.median(ms):.3g} / {np.percentile(ms, 95):.3g}"


def measure(n: int, *, calls: int, batch_calls: int, seed: int = 20261202) -> dict[str, str]:
    scores, groups = _scores(n, seed)
    reliance = Reliance(floor=DEFAULT_FLOOR)
    started = time.perf_counter()
    build_index(scores, reliance=reliance, loss_bound=1.0, groups=groups, num_groups=_GROUPS)
    engine_build = time.perf_counter() - started
    u = usefulness(scores, loss_bound=1.0)
    g = scores.expected_loss
    reach = np.sqrt(scores.worst_squared_deviation)  # type: ignore[arg-type]
    started = time.perf_counter()
    index = DrawIndex.build(
        u, g, loss_bound=1.0, groups=groups, num_groups=_GROUPS, max_deviation=reach
    )
    core_build = time.perf_counter() - started

    index_seconds: list[float] = []
    batch_seconds: list[float] = []
    same = 0
    high_ratio: list[float] = []
    low_ratio: list[float] = []
    for call in range(calls):
        rng_seed = [seed, call]
        if call < batch_calls:
            candidates = np.flatnonzero(index.present_[:n])
            started = time.perf_counter()
            expected = draw_batch(
                u[candidates],
                g[candidates],
                _COUNT,
                floor=DEFAULT_FLOOR,
                loss_bound=1.0,
                rng=np.random.default_rng(rng_seed),
                groups=groups[candidates],
                num_groups=_GROUPS,
                max_deviation=reach[candidates],
            )
            batch_seconds.append(time.perf_counter() - started)
        started = time.perf_counter()
        got = index.draw(_COUNT, floor=DEFAULT_FLOOR, rng=np.random.default_rng(rng_seed))
        index_seconds.append(time.perf_counter() - started)
        if call < batch_calls:
            same += int(
                np.array_equal(candidates[expected.positions], got.positions)
                and np.allclose(got.probabilities, expected.probabilities, rtol=1e-12, atol=0)
            )
            high_ratio.extend((got.correction_high / expected.correction_high).tolist())
            low_ratio.extend((got.correction_low / expected.correction_low).tolist())
    # Ingest between refits: 2,000 new rows join the index.
    new_scores, new_groups = _scores(2000, seed + 1)
    rows = np.arange(n, n + 2000)
    started = time.perf_counter()
    index.add(
        rows,
        usefulness(new_scores, loss_bound=1.0),
        new_scores.expected_loss,
        groups=new_groups,
        max_deviation=np.sqrt(new_scores.worst_squared_deviation),  # type: ignore[arg-type]
    )
    add_seconds = time.perf_counter() - started
    return {
        "items": f"{n:,}",
        "build (core / engine)": f"{core_build:.3g} / {engine_build:.3g} s",
        "draw_batch k=10": _stats(batch_seconds),
        "index k=10": _stats(index_seconds),
        "speed-up (medians)": f"{np.median(batch_seconds) / np.median(index_seconds):.0f}x",
        "add 2,000 items": f"{add_seconds * 1e3:.3g} ms",
        "same draws": f"{same} / {min(calls, batch_calls)}",
        "range width ratio high (median / max)": (
            f"{np.median(high_ratio):.4f} / {np.max(high_ratio):.4f}"
        ),
        "range width ratio low (median / max)": (
            f"{np.median(low_ratio):.4f} / {np.max(low_ratio):.4f}"
        ),
        "calls": f"{len(batch_seconds)} / {len(index_seconds)}",
    }


def label_check(repetitions: int) -> list[dict[str, str]]:
    """The label benchmark's quick scenarios, each repetition run twice on the same seeds:
    leadline's draws through the draw index (as the server) and through ``select``'s
    whole-candidate pass (as before). Same draws; the differences come from the
    correction ranges (conservative vs exact) and from rounding."""
    rows = []
    for name in QUICK_SCENARIO_NAMES:
        scenario = build_scenario(name, quick=True)
        estimate, fixed, anytime, widths = 0.0, 0.0, 0.0, []
        for repetition in range(repetitions):
            runs = [
                run_repetition(
                    scenario,
                    repetition,
                    HarnessConfig(surrogate_settings=surrogate_settings(), draw_index=path),
                )
                for path in (True, False)
            ]
            a, b = runs
            estimate = max(estimate, float(np.nanmax(np.abs(a.estimate - b.estimate))))
            for low, high in ((a.lower, b.lower), (a.upper, b.upper)):
                fixed = max(fixed, float(np.nanmax(np.abs(low - high))))
            for low, high in (
                (a.anytime_lower, b.anytime_lower),
                (a.anytime_upper, b.anytime_upper),
            ):
                anytime = max(anytime, float(np.nanmax(np.abs(low - high))))
            width_a = a.anytime_upper - a.anytime_lower
            width_b = b.anytime_upper - b.anytime_lower
            valid = np.isfinite(width_a) & np.isfinite(width_b) & (width_b > 0)
            widths.extend((width_a[valid] / width_b[valid]).tolist())
        rows.append(
            {
                "scenario": name,
                "repetitions": str(repetitions),
                "point estimates, max abs diff": f"{estimate:.2g}",
                "fixed-time bounds, max abs diff": f"{fixed:.2g}",
                "anytime bounds, max abs diff": f"{anytime:.2g}",
                "anytime width ratio index / exact (mean / max)": (
                    f"{np.mean(widths):.5f} / {np.max(widths):.5f}"
                ),
            }
        )
        print(_table(rows[-1:]), flush=True)
    return rows


def _table(rows: list[dict[str, str]]) -> str:
    head = list(rows[0])
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    lines += ["| " + " | ".join(row[h] for h in head) + " |" for row in rows]
    return "\n".join(lines)


def _commit() -> str:
    try:
        return subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
            cwd=_ROOT,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100k and 1M items, print only")
    parser.add_argument(
        "--label-repetitions",
        type=int,
        default=5,
        help="repetitions per quick label scenario run by both draw paths (0: skip)",
    )
    args = parser.parse_args(argv)
    sizes = [100_000, 1_000_000] if args.quick else [100_000, 1_000_000, 10_000_000]
    started = time.monotonic()
    load = os.getloadavg()
    rows = []
    for n in sizes:
        batch_calls = 30 if n <= 1_000_000 else 10
        rows.append(measure(n, calls=300, batch_calls=batch_calls))
        print(_table(rows[-1:]), flush=True)
    table = _table(rows)
    labels = label_check(args.label_repetitions) if args.label_repetitions else []
    body = "\n".join(
        [
            "## Draws: draw index beside draw_batch",
            "",
            f"- Command: `.venv/bin/python benchmarks/draws.py{' --quick' if args.quick else ''}`",
            f"- Date: {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC; code: commit {_commit()}",
            f"- Machine: {os.cpu_count()} cores, Python {platform.python_version()}, numpy "
            f"{np.__version__}; load average {load[0]:.2f} at the start, "
            f"{os.getloadavg()[0]:.2f} at the end; wall time "
            f"{(time.monotonic() - started) / 60:.1f} minutes",
            "",
            "One process, no server: the core's `draw_batch` over the candidates (what each "
            "AcquireItems did before) and `DrawIndex.draw` (what it does now) on the same "
            "pool, candidates and generator seed, alternating call by call; each call draws "
            "10 items, which leave the index. Times in ms, median / p95; `calls` = draw_batch "
            "/ index calls. `same draws`: calls where both paths drew the same items with "
            "probabilities equal to 1e-12. The range width ratios compare the index's "
            "conservative correction range with draw_batch's exact one on the same draws "
            "(1 = as narrow; the index's must be >= 1).",
            "",
            table,
        ]
        + (
            [
                "",
                "The label benchmark with both draw paths (`HarnessConfig.draw_index`), each "
                "repetition of the quick scenarios run twice on the same seeds: draws "
                "through the index (as the server makes them) and through `select`'s "
                "whole-candidate pass (as before). Every budget and method of "
                "`benchmarks/labels.py`; the anytime width ratio is over every draw "
                "count of the anytime paths.",
                "",
                _table(labels),
            ]
            if labels
            else []
        )
    )
    print()
    print(body)
    if not args.quick:
        replace_section(_ROOT / "BENCHMARKS.md", _SECTION, body)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
