"""The system benchmark's scaling table and mixed-load run (see :mod:`benchmarks.system`).

Per pool size, one fresh ``leadline serve`` child with the default settings (refit
cadence included) and the parcel-sorting pool of :mod:`benchmarks.system`:

1. ingest every item in 2,000-row batches; beside it, a bare stdlib sqlite3 insert of the
   same rows in leadline's own layout, one durable commit per batch (the floor of
   :mod:`benchmarks.ingest`, reused; every ``bare_every``-th batch, interleaved, so both
   see the same load);
2. a labeling run of ``label_seconds``: rounds of AcquireItems(10), SubmitLabels with the
   true classes, then one fresh GetEstimate or CheckGate (alternating, so each is the first
   call after the label) and a GetPool for the surrogate lag (labeled draws the surrogate
   in force was not fitted on). Each round also times the floors: a no-op round trip (the
   health check) and one bare durable 10-row SQLite commit (WAL, synchronous=FULL).
   Refits run as the server's own cadence has them; their share of one core is the rate of
   the server's ``leadline_refit_cpu_seconds_total`` over the run (the refit in flight at
   the end is waited for and counted, and so is its time);
3. resident memory (VmRSS growth since the empty pool) per item after that run, beside
   the raw float32 features + outputs; the refit time (server's mean refit seconds) beside
   a bare ``fit_surrogate`` on the same labels plus ``Surrogate.score`` of every item.

At the main size the same server then takes the mixed load: ``MIXED_CLIENTS`` clients at
once, each with its own channel: ingesters (a 2,000-row batch of new items every half
second each), labelers (AcquireItems(10) + SubmitLabels back to back) and gate pollers
(CheckGate and GetEstimate back to back); p50 / p99 per RPC.
"""

from __future__ import annotations

import re
import sqlite3
import threading
import time
import urllib.request
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path

import numpy as np

from benchmarks.ingest import _BareChunks as BareChunks
from benchmarks.system import (
    LABELER,
    POOL_ID,
    ServerProcess,
    SyntheticPool,
    bare_refit_seconds,
    ingest_batch,
    make_pool_data,
)
from leadline.client import Client
from leadline.service.estimation import LossKind, LossSpec

__all__ = [
    "MIXED_CLIENTS",
    "MixedRow",
    "ScalingConfig",
    "SizeResult",
    "format_mixed_table",
    "format_scaling_table",
    "run_scaling",
]

MIXED_CLIENTS = {"ingest": 2, "label": 4, "gate": 2}  # 8 clients at once
_INGEST_PERIOD_SECONDS = 0.5
_GATE_MAX_RISK = 0.5


@dataclass(frozen=True, kw_only=True)
class ScalingConfig:
    sizes: tuple[int, ...]
    main_size: int  # the size that also takes the mixed load
    label_seconds: float = 20.0
    mixed_seconds: float = 20.0
    feature_dim: int = 32
    num_classes: int = 10
    batch_rows: int = 2_000
    seed: int = 20_261_202
    startup_timeout: float = 600.0
    refit_timeout: float = 1_800.0


@dataclass
class SizeResult:
    items: int
    ingest_rate: float = 0.0
    bare_insert_rate: float = 0.0
    acquire: list[float] = field(default_factory=list)
    estimate: list[float] = field(default_factory=list)
    gate: list[float] = field(default_factory=list)
    noop: list[float] = field(default_factory=list)
    commit: list[float] = field(default_factory=list)
    lag: list[int] = field(default_factory=list)
    labels: int = 0
    refits: int = 0
    refit_seconds: float = 0.0
    refit_cpu_share: float = 0.0
    run_seconds: float = 0.0
    bare_fit_seconds: float = 0.0
    bare_score_seconds: float = 0.0
    bytes_per_item: float = 0.0
    raw_bytes_per_item: float = 0.0
    rss_notes: str = ""


@dataclass(frozen=True)
class MixedRow:
    method: str
    role: str
    samples: tuple[float, ...]


def _metric(text: str, name: str) -> float:
    match = re.search(rf"^{name} (\S+)$", text, re.MULTILINE)
    return float(match.group(1)) if match else 0.0


def _scrape(server: ServerProcess) -> str:
    match = re.search(r"metrics on (http://\S+:\d+/metrics)", server.log())
    if match is None:
        raise RuntimeError("the server did not log its metrics address")
    with urllib.request.urlopen(match.group(1), timeout=120) as reply:
        return str(reply.read().decode("utf-8"))


def _timed(samples: list[float], call: Callable[[], object]) -> object:
    started = time.perf_counter()
    result = call()
    samples.append(time.perf_counter() - started)
    return result


class _BareCommit:
    """One durable 10-row commit per call: stdlib sqlite3, WAL, synchronous=FULL."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._db = sqlite3.connect(path, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.execute(
            "CREATE TABLE draws (id INTEGER PRIMARY KEY, row INTEGER, q REAL, holder TEXT)"
        )
        self._next = 0

    def commit(self) -> None:
        rows = [(self._next + i, i, 0.5, "bench") for i in range(10)]
        self._next += 10
        self._db.execute("BEGIN")
        self._db.executemany("INSERT INTO draws VALUES (?, ?, ?, ?)", rows)
        self._db.execute("COMMIT")

    def close(self) -> None:
        self._db.close()
        for suffix in ("", "-wal", "-shm"):
            Path(f"{self.path}{suffix}").unlink(missing_ok=True)


def _client(server: ServerProcess, batch_rows: int) -> Client:
    return Client(
        server.target,
        token=server.token,
        timeout=600.0,
        max_batch_rows=batch_rows,
        max_batch_bytes=16 << 20,
    )


def _ingest(
    config: ScalingConfig,
    client: Client,
    data: SyntheticPool,
    segments: list[str],
    n: int,
    workdir: Path,
    result: SizeResult,
) -> None:
    bare = BareChunks(workdir / "bare-insert.db")
    bare_every = max(1, n // 1_000_000)
    ours: list[float] = []
    theirs: list[float] = []
    bare_rows = 0
    try:
        for index, start in enumerate(range(0, n, config.batch_rows)):
            part = slice(start, min(n, start + config.batch_rows))
            if index % bare_every == 0:
                now = int(time.time() * 1000)
                _timed(theirs, lambda part=part, now=now: bare.insert(data, part, now))
                bare_rows += part.stop - part.start
            _timed(ours, lambda part=part: ingest_batch(client, data, segments, part))
    finally:
        bare.close()
    result.ingest_rate = n / sum(ours)
    result.bare_insert_rate = bare_rows / sum(theirs)


def _labeling_run(
    config: ScalingConfig,
    server: ServerProcess,
    client: Client,
    data: SyntheticPool,
    workdir: Path,
    result: SizeResult,
    say: Callable[[str], None],
) -> list[int]:
    """The labeling run; returns the labeled rows."""
    bare = _BareCommit(workdir / "bare-commit.db")
    labeled_rows: list[int] = []
    before = _scrape(server)
    started = time.perf_counter()
    round_index = 0
    try:
        while time.perf_counter() - started < config.label_seconds:
            _timed(result.noop, client.health)
            _timed(result.commit, bare.commit)
            got = _timed(result.acquire, lambda: client.acquire(POOL_ID, 10, labeler=LABELER))
            assert isinstance(got, list)
            answers = {}
            for assignment in got:
                row = data.row_of(assignment.item_id)
                answers[assignment.assignment_id] = int(data.labels[row])
                labeled_rows.append(row)
            client.submit_labels(POOL_ID, answers, labeler=LABELER)
            if round_index % 2 == 0:
                _timed(result.estimate, lambda: client.get_estimate(POOL_ID))
            else:
                _timed(
                    result.gate,
                    lambda: client.check_gate(POOL_ID, max_risk=_GATE_MAX_RISK),
                )
            pool = client.get_pool(POOL_ID)
            result.lag.append(int(pool.labeled_count - pool.surrogate_label_count))
            round_index += 1
    finally:
        bare.close()
    ended = time.perf_counter()
    # Wait for the refit in flight (if any) so its CPU is counted, with its time.
    refits_before = _metric(before, "leadline_refits_total")
    deadline = ended + config.refit_timeout
    after = _scrape(server)
    while True:
        pool = client.get_pool(POOL_ID)
        if pool.surrogate_label_count == pool.labeled_count or time.perf_counter() > deadline:
            break
        time.sleep(0.1)
    after = _scrape(server)
    settled = time.perf_counter()
    result.labels = len(labeled_rows)
    result.refits = int(_metric(after, "leadline_refits_total") - refits_before)
    cpu = _metric(after, "leadline_refit_cpu_seconds_total") - _metric(
        before, "leadline_refit_cpu_seconds_total"
    )
    seconds = _metric(after, "leadline_refit_seconds_total") - _metric(
        before, "leadline_refit_seconds_total"
    )
    result.run_seconds = settled - started
    result.refit_cpu_share = cpu / result.run_seconds
    result.refit_seconds = seconds / result.refits if result.refits else float("nan")
    say(
        f"labeling run: {result.labels} labels, {result.refits} refits "
        f"({result.refit_seconds:.2f} s each), refit CPU share {result.refit_cpu_share:.2f}, "
        f"lag median {np.median(result.lag):.0f} max {max(result.lag)}"
    )
    return labeled_rows


def _mixed_load(
    config: ScalingConfig,
    server: ServerProcess,
    data: SyntheticPool,
    segments: list[str],
    first_new: int,
) -> list[MixedRow]:
    """MIXED_CLIENTS clients at once for ``mixed_seconds``; latencies per (method, role)."""
    stop = threading.Event()
    lock = threading.Lock()
    samples: dict[tuple[str, str], list[float]] = {}
    errors: list[BaseException] = []
    next_row = [first_new]
    total = len(data.item_ids)

    def record(method: str, role: str, call: Callable[[], object]) -> object:
        started = time.perf_counter()
        result = call()
        elapsed = time.perf_counter() - started
        with lock:
            samples.setdefault((method, role), []).append(elapsed)
        return result

    def ingester(client: Client) -> None:
        while not stop.is_set():
            with lock:
                start = next_row[0]
                next_row[0] = min(total, start + config.batch_rows)
            if start >= total:
                return
            part = slice(start, min(total, start + config.batch_rows))
            began = time.perf_counter()
            record(
                "IngestItems",
                "ingest",
                partial(ingest_batch, client, data, segments, part),
            )
            stop.wait(max(0.0, _INGEST_PERIOD_SECONDS - (time.perf_counter() - began)))

    def labeler(client: Client, name: str) -> None:
        while not stop.is_set():
            got = record("AcquireItems", "label", lambda: client.acquire(POOL_ID, 10, labeler=name))
            assert isinstance(got, list)
            if not got:
                continue
            answers = {a.assignment_id: int(data.labels[data.row_of(a.item_id)]) for a in got}
            record(
                "SubmitLabels",
                "label",
                partial(client.submit_labels, POOL_ID, answers, labeler=name),
            )

    def poller(client: Client) -> None:
        while not stop.is_set():
            record("CheckGate", "gate", lambda: client.check_gate(POOL_ID, max_risk=_GATE_MAX_RISK))
            record("GetEstimate", "gate", lambda: client.get_estimate(POOL_ID))

    def guard(target: Callable[[Client], None]) -> Callable[[], None]:
        def run() -> None:
            try:
                with _client(server, config.batch_rows) as client:
                    target(client)
            except BaseException as error:  # noqa: BLE001 - reported after the run
                errors.append(error)
                stop.set()

        return run

    threads = [threading.Thread(target=guard(ingester)) for _ in range(MIXED_CLIENTS["ingest"])]
    threads += [
        threading.Thread(target=guard(lambda c, i=i: labeler(c, f"{LABELER}-{i}")))
        for i in range(MIXED_CLIENTS["label"])
    ]
    threads += [threading.Thread(target=guard(poller)) for _ in range(MIXED_CLIENTS["gate"])]
    for thread in threads:
        thread.start()
    stop.wait(config.mixed_seconds)
    stop.set()
    for thread in threads:
        thread.join()
    if errors:
        raise RuntimeError(f"mixed load: a client failed: {errors[0]!r}") from errors[0]
    return [MixedRow(method, role, tuple(values)) for (method, role), values in samples.items()]


def _measure_size(
    config: ScalingConfig, n: int, workdir: Path, say: Callable[[str], None]
) -> tuple[SizeResult, list[MixedRow]]:
    mixed = n == config.main_size
    extra = (
        int(
            MIXED_CLIENTS["ingest"]
            * config.batch_rows
            * config.mixed_seconds
            / _INGEST_PERIOD_SECONDS
        )
        + config.batch_rows
        if mixed
        else 0
    )
    data = make_pool_data(
        n + extra, feature_dim=config.feature_dim, num_classes=config.num_classes, seed=config.seed
    )
    segments = data.segments
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=config.num_classes)
    result = SizeResult(items=n, raw_bytes_per_item=4.0 * (config.feature_dim + config.num_classes))
    say(f"scaling: {n:,} items (data ready)")
    workdir.mkdir(parents=True, exist_ok=True)
    server = ServerProcess(
        workdir / "server",
        extra_args=["--draw-seed", str(config.seed)],
        startup_timeout=config.startup_timeout,
    )
    rows: list[MixedRow] = []
    with server, _client(server, config.batch_rows) as client:
        client.create_pool(
            POOL_ID,
            task="classification",
            feature_dim=config.feature_dim,
            num_classes=config.num_classes,
            loss="zero-one",
        )
        empty = server.rss_bytes()
        _ingest(config, client, data, segments, n, workdir, result)
        ingested = server.rss_bytes()
        say(
            f"ingest {result.ingest_rate:,.0f} rows/s (bare {result.bare_insert_rate:,.0f}); "
            f"{(ingested - empty) / n:,.0f} B/item"
        )
        labeled = _labeling_run(config, server, client, data, workdir, result, say)
        after = server.rss_bytes()
        result.bytes_per_item = (after - empty) / n
        result.rss_notes = (
            f"VmRSS {empty / 2**20:,.0f} MiB with the empty pool, {ingested / 2**20:,.0f} MiB "
            f"after ingest, {after / 2**20:,.0f} MiB after the labeling run"
        )
        if mixed:
            rows = _mixed_load(config, server, data, segments, n)
            say(f"mixed load: {sum(len(r.samples) for r in rows)} calls")
    if server.returncode != 0:
        raise RuntimeError(f"leadline serve exited with {server.returncode}")
    fit, score = bare_refit_seconds(
        spec, _first(data, n), np.array(labeled), version=1, seed=config.seed
    )
    result.bare_fit_seconds, result.bare_score_seconds = fit, score
    say(f"bare fit {fit:.2f} s + scoring {score:.2f} s; {result.bytes_per_item:,.0f} B/item")
    return result, rows


def _first(data: SyntheticPool, n: int) -> SyntheticPool:
    """The first ``n`` items (the pool as the labeling run saw it)."""
    return SyntheticPool(
        item_ids=data.item_ids[:n],
        features=data.features[:n],
        outputs=data.outputs[:n],
        labels=data.labels[:n],
        segment_codes=data.segment_codes[:n],
        event_time_ms=data.event_time_ms[:n],
    )


def run_scaling(
    config: ScalingConfig, workdir: Path, say: Callable[[str], None]
) -> tuple[list[SizeResult], list[MixedRow]]:
    results: list[SizeResult] = []
    mixed: list[MixedRow] = []
    for n in config.sizes:
        result, rows = _measure_size(config, n, workdir / f"scale-{n}", say)
        results.append(result)
        mixed.extend(rows)
    return results, mixed


def _ms(values: Sequence[float], q: float) -> str:
    value = 1000.0 * float(np.percentile(np.asarray(values, dtype=np.float64), q))
    return f"{value:.3g}" if value < 100 else f"{value:,.0f}"


def _pair(values: Sequence[float]) -> str:
    return f"{_ms(values, 50)} / {_ms(values, 95)}" if values else "n/a"


def format_scaling_table(results: Sequence[SizeResult]) -> str:
    """One column per size; each figure beside its floor from the same run."""
    header = "| measurement | " + " | ".join(f"{r.items:,} items" for r in results) + " |"
    lines = [header, "|---|" + "---:|" * len(results)]

    def line(name: str, cells: Sequence[str]) -> None:
        lines.append(f"| {name} | " + " | ".join(cells) + " |")

    def floor(r: SizeResult) -> float:
        return float(np.median(r.noop) + np.median(r.commit))

    line("AcquireItems(10), median / p95 ms", [_pair(r.acquire) for r in results])
    line(
        "floor: no-op round trip + bare durable 10-row commit, median ms",
        [f"{1000 * floor(r):.3g}" for r in results],
    )
    line(
        "AcquireItems(10) median / floor",
        [f"{np.median(r.acquire) / floor(r):.3g}x" for r in results],
    )
    line("GetEstimate after a label, median / p95 ms", [_pair(r.estimate) for r in results])
    line("CheckGate after a label, median / p95 ms", [_pair(r.gate) for r in results])
    line("floor: no-op round trip (health check), median ms", [_pair(r.noop) for r in results])
    line(
        "GetEstimate median / no-op round trip",
        [f"{np.median(r.estimate) / np.median(r.noop):.3g}x" for r in results],
    )
    line("ingest, rows/s", [f"{r.ingest_rate:,.0f}" for r in results])
    line(
        "floor: bare sqlite3 insert of the same rows (same layout), rows/s",
        [f"{r.bare_insert_rate:,.0f}" for r in results],
    )
    line("ingest / bare insert", [f"{r.ingest_rate / r.bare_insert_rate:.2f}" for r in results])
    line("refit (fit + rescoring), mean s", [f"{r.refit_seconds:.2f}" for r in results])
    line(
        "floor: bare fit_surrogate + Surrogate.score of every item, s",
        [f"{r.bare_fit_seconds:.2f} + {r.bare_score_seconds:.2f}" for r in results],
    )
    line(
        "labeling run: labels, refits, seconds",
        [f"{r.labels:,}, {r.refits}, {r.run_seconds:.0f}" for r in results],
    )
    line("CPU share of one core taken by refits", [f"{r.refit_cpu_share:.2f}" for r in results])
    line(
        "surrogate lag (labels not yet in the surrogate), median / max",
        [f"{np.median(r.lag):.0f} / {max(r.lag)}" for r in results],
    )
    line("resident memory after the run, B/item", [f"{r.bytes_per_item:,.0f}" for r in results])
    line(
        "floor: raw float32 features + outputs, B/item",
        [f"{r.raw_bytes_per_item:,.0f}" for r in results],
    )
    return "\n".join(lines)


def format_mixed_table(rows: Sequence[MixedRow]) -> str:
    lines = ["| RPC | client role | calls | p50 ms | p99 ms |", "|---|---|---:|---:|---:|"]
    for row in sorted(rows, key=lambda r: (r.role, r.method)):
        lines.append(
            f"| {row.method} | {row.role} | {len(row.samples):,} | {_ms(row.samples, 50)} | "
            f"{_ms(row.samples, 99)} |"
        )
    return "\n".join(lines)
