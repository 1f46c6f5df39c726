"""Fresh estimates in process: the cost of a GetEstimate / CheckGate right after a label.

Builds a pool of N items in memory with the engine's own functions (ingest, acquire,
submit; no server, no store: the writes the engine returns are dropped), makes a few
hundred labeled draws, then repeats: submit one label, time one estimate (whole pool,
balanced) and one gate on a segment. Every label bumps the pool's state version, so each
timed call is a fresh computation, never a cache hit.

    .venv/bin/python -m benchmarks.estimates --sizes 100000 1000000
    .venv/bin/python -m benchmarks.estimates --sizes 1000000 --profile   # cProfile top 25

Each size is measured twice in the same run, on the same pool: "before" puts back the
previous code paths (every scope's inputs from one pass over the items, the reference the
running sums are tested against; and the bound edges by 60-step bisection with the 2-D
log-capital evaluation) by patching them in for the timing, "after" is the code as it is.

With ``--write`` the table goes to its own marked section of BENCHMARKS.md.
"""

from __future__ import annotations

import argparse
import cProfile
import os
import pstats
import statistics
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from benchmarks.markdown import replace_section
from leadline.service.engine import labeling, queries
from leadline.service.engine.ingest import apply_batch
from leadline.service.engine.pool import PoolSettings, PoolState
from leadline.service.engine.results import ItemBatch, LabelInput
from leadline.service.engine.scopes import Scope, ScopeInputs, build_window_inputs
from leadline.service.estimation import BoundKind, EstimatorMode, bounds

_SECTION = "estimates"
_NUM_CLASSES = 4
_FEATURE_DIM = 4
_SEGMENTS = [f"depot-{i}" for i in range(8)]
_BATCH = 100_000


@dataclass(frozen=True)
class Timing:
    n: int
    draws: int
    code: str  # "before" or "after"
    estimate_ms: list[float]
    gate_ms: list[float]
    estimate_cpu_ms: list[float]
    gate_cpu_ms: list[float]


def _full_pass_inputs(pool: PoolState, scope: Scope) -> ScopeInputs:
    """The previous ``build_scope_inputs``: one pass over the items for every scope."""
    code = pool.data.segment_codes[scope.segment] if scope.segment else -1
    return build_window_inputs(pool, scope, code)


def _bisection_edge(margin: Callable[[float], float], support: tuple[float, float]) -> float:
    """The previous edge search: 60 bisection steps over the whole support."""
    rejected, accepted = float(support[0]), float(support[1])
    if not margin(rejected) >= 0.0:
        return rejected
    if margin(accepted) >= 0.0:
        return accepted
    for _ in range(60):
        middle = 0.5 * (rejected + accepted)
        if margin(middle) >= 0.0:
            rejected = middle
        else:
            accepted = middle
    return rejected


def _log_factors_2d(x: np.ndarray, lo: np.ndarray, bets: np.ndarray, r: float) -> np.ndarray:
    """The previous per-candidate evaluation (through the (M, G) log-capital)."""
    return bounds._log_capital(x, lo, bets, np.array([r]))[:, 0]


class _Before:
    """Patch the previous code paths in while timing "before"."""

    def __enter__(self) -> None:
        self._saved = (queries.build_scope_inputs, bounds._excluded_edge, bounds._log_factors)
        queries.build_scope_inputs = _full_pass_inputs  # type: ignore[assignment]
        bounds._excluded_edge = _bisection_edge
        bounds._log_factors = _log_factors_2d

    def __exit__(self, *_: object) -> None:
        queries.build_scope_inputs, bounds._excluded_edge, bounds._log_factors = self._saved


def build_pool(n: int, *, draws: int, seed: int) -> tuple[PoolState, np.ndarray]:
    """A classification pool of ``n`` items with ``draws`` labeled draws; the true labels."""
    rng = np.random.default_rng(seed)
    settings = PoolSettings(
        pool_id="bench",
        task="classification",
        num_classes=_NUM_CLASSES,
        feature_dim=_FEATURE_DIM,
        loss="zero_one",
    )
    pool = PoolState(settings=settings, seed=seed, create_time_ms=0)
    labels = np.empty(n, dtype=np.int64)
    for start in range(0, n, _BATCH):
        stop = min(n, start + _BATCH)
        size = stop - start
        logits = rng.standard_normal((size, _NUM_CLASSES)) * 2.0
        outputs = np.exp(logits - logits.max(axis=1, keepdims=True))
        outputs /= outputs.sum(axis=1, keepdims=True)
        cdf = np.cumsum(outputs, axis=1)
        labels[start:stop] = np.minimum((cdf < rng.random((size, 1))).sum(axis=1), _NUM_CLASSES - 1)
        batch = ItemBatch(
            item_ids=[f"item-{i}" for i in range(start, stop)],
            features=rng.standard_normal((size, _FEATURE_DIM)).astype(np.float32),
            outputs=outputs.astype(np.float32),
            segments=[_SEGMENTS[c] for c in rng.integers(len(_SEGMENTS), size=size)],
            event_time_ms=np.arange(start, stop, dtype=np.int64) * 1000,
        )
        with pool.lock:
            surrogate = pool.data.surrogate
            current = surrogate.score(batch.features, batch.outputs)
            cold = pool.cold.score(batch.features, batch.outputs)
            apply_batch(pool, batch, scored_with=surrogate, cold=cold, current=current)
    while len(pool.data.draws) < draws:
        label_next(pool, labels, count=min(100, draws - len(pool.data.draws)))
    return pool, labels


def label_next(pool: PoolState, labels: np.ndarray, *, count: int = 1) -> None:
    """Acquire ``count`` draws and submit their true labels."""
    with pool.lock:
        infos, _ = labeling.acquire(
            pool, count=count, labeler="bench", holder="h", lease_seconds=3600, floor=0.1
        )
        submissions = [
            LabelInput(
                assignment_id=info.assignment_id,
                class_label=int(labels[int(info.item_id.rsplit("-", 1)[1])]),
            )
            for info in infos
        ]
        labeling.submit(pool, labeler="bench", holder="h", labels=submissions)


def _timed(call: Callable[[], object]) -> tuple[float, float]:
    """(wall ms, this thread's CPU ms) of one call: on a busy machine the CPU time shows
    the work, the wall time also the waiting for a core."""
    started, cpu = time.perf_counter(), time.thread_time()
    call()
    return 1000.0 * (time.perf_counter() - started), 1000.0 * (time.thread_time() - cpu)


def time_fresh(pool: PoolState, labels: np.ndarray, *, repeats: int, code: str) -> Timing:
    """``repeats`` rounds of: one label, then one estimate and one gate (both fresh)."""
    whole = Scope()
    segment = Scope(segment=_SEGMENTS[0])
    estimate: list[tuple[float, float]] = []
    gate: list[tuple[float, float]] = []
    for _ in range(repeats):
        label_next(pool, labels)
        estimate.append(
            _timed(
                lambda: queries.estimate(pool, whole, mode=EstimatorMode.BALANCED, confidence=0.95)
            )
        )
        gate.append(
            _timed(
                lambda: queries.gate(
                    pool,
                    segment,
                    max_risk=0.5,
                    confidence=0.95,
                    bound=BoundKind.ANYTIME,
                    mode=EstimatorMode.BALANCED,
                )
            )
        )
    return Timing(
        pool.data.item_count,
        len(pool.data.draws),
        code,
        [wall for wall, _ in estimate],
        [wall for wall, _ in gate],
        [cpu for _, cpu in estimate],
        [cpu for _, cpu in gate],
    )


def _median_p95(samples: Sequence[float]) -> str:
    ordered = sorted(samples)
    p95 = ordered[min(len(ordered) - 1, round(0.95 * (len(ordered) - 1)))]
    return f"{statistics.median(ordered):.2f} / {p95:.2f}"


def format_table(timings: Sequence[Timing]) -> str:
    lines = [
        "| items | draws | code | fresh estimate, whole pool: wall ms, median / p95 "
        "| its CPU ms, median / p95 | fresh gate, one segment, anytime: wall ms "
        "| its CPU ms |",
        "|---:|---:|---|---:|---:|---:|---:|",
    ]
    for t in timings:
        lines.append(
            f"| {t.n:,} | {t.draws:,} | {t.code} | {_median_p95(t.estimate_ms)} "
            f"| {_median_p95(t.estimate_cpu_ms)} | {_median_p95(t.gate_ms)} "
            f"| {_median_p95(t.gate_cpu_ms)} |"
        )
    return "\n".join(lines)


def _parse(argv: Sequence[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--draws", type=int, default=1000, help="labeled draws before timing")
    parser.add_argument("--repeats", type=int, default=50)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--profile", action="store_true", help="print a cProfile of the runs")
    parser.add_argument("--no-before", action="store_true", help="time the current code only")
    parser.add_argument("--write", action="store_true", help="write BENCHMARKS.md's section")
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = _parse(argv)
    timings = []
    for n in args.sizes:
        pool, labels = build_pool(n, draws=args.draws, seed=args.seed)
        if not args.no_before:
            with _Before():
                timings.append(time_fresh(pool, labels, repeats=args.repeats, code="before"))
        if args.profile:
            profiler = cProfile.Profile()
            profiler.enable()
        timings.append(time_fresh(pool, labels, repeats=args.repeats, code="after"))
        if args.profile:
            profiler.disable()
            pstats.Stats(profiler).sort_stats("tottime").print_stats(25)
    table = format_table(timings)
    load = ", ".join(f"{value:.1f}" for value in os.getloadavg())
    table += f"\n\nLoad average at the end (1, 5, 15 min): {load} on {os.cpu_count()} cores."
    print(table)
    if args.write:
        command = "python -m benchmarks.estimates " + " ".join(argv or sys.argv[1:])
        body = (
            "## Fresh estimates in process\n\n"
            "A pool of N items (4 classes, 8 segments) built with the engine's own ingest, "
            "acquire and submit in one process (no server, no store), about 1,000 labeled "
            "draws; then rounds of one label followed by one GetEstimate-equivalent (whole "
            "pool, BALANCED, 95%) and one CheckGate-equivalent (one segment, ANYTIME), each "
            "computed fresh (every label invalidates the cache). *before*: the previous code "
            "paths patched in for the timing (every scope's inputs from one pass over the "
            "items; bound edges by 60-step bisection), on the same pool in the same run; "
            "*after*: the code as it is.\n\n"
            f"Reproduce: `{command.replace(' --write', '')}`\n\n{table}\n"
        )
        path = Path(__file__).resolve().parent.parent / "BENCHMARKS.md"
        replace_section(path, _SECTION, body)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
