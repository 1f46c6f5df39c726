"""System benchmark: the real leadline server beside the bare libraries it is built on.

Run from the repository root:

    .venv/bin/python benchmarks/system.py            # full: 1M-item detail, 100k/1M/10M scaling
    .venv/bin/python benchmarks/system.py --quick    # 100,000 items only, fewer repetitions
    .venv/bin/python benchmarks/system.py --quick --sizes 100000,300000   # other sizes

Two parts: the detailed table at the main size (below), then the scaling table and the
mixed-load run of :mod:`benchmarks.system_scaling` (one fresh server per size, default
settings, each figure beside its floor measured in the same run).

The harness starts ``leadline serve`` as a child process on 127.0.0.1 port 0 with a fresh
data directory and a token file, reads the port from its ``leadline listening on
HOST:PORT`` line, and talks to it with the real :class:`leadline.client.Client`. Every
server figure stands beside a bare-library figure measured in the same run on the same
data (stdlib sqlite3, numpy, the estimation core called directly); the ratio
leadline / baseline is the point, absolute times on a shared two-core machine are noisy.

The data is an invented scenario: a parcel-sorting camera's 10-class package-type
classifier, 32 image-embedding features per parcel, four sorting halls as segments,
parcels arriving at a steady rate. The model is over-confident: its class probabilities
are a sharpened, noisy version of the ones the true labels are drawn from.

The full run writes its section of BENCHMARKS.md (between the ``system-benchmark``
markers, see :mod:`benchmarks.markdown`); the quick run writes bench-out/system-quick.md
unless ``--output`` says otherwise. Both print the table.
"""

from __future__ import annotations

import argparse
import datetime as dt
import logging
import os
import platform
import re
import secrets
import shlex
import sqlite3
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

_ROOT = Path(__file__).resolve().parents[1]
if str(_ROOT) not in sys.path:  # run as a script: make `benchmarks` importable
    sys.path.insert(0, str(_ROOT))

from benchmarks.markdown import replace_section  # noqa: E402
from leadline.client import Client, LocalServer  # noqa: E402
from leadline.service.engine.ledger import DrawLedger, select  # noqa: E402
from leadline.service.estimation import (  # noqa: E402
    DEFAULT_FLOOR,
    DrawTerms,
    EstimatorMode,
    LossKind,
    LossSpec,
    PlugInSums,
    Reliance,
    SurrogateScores,
    SurrogateSettings,
    cold_start_surrogate,
    draw_batch,
    estimate_risk,
    fit_surrogate,
    selection_probabilities,
    usefulness,
)
from leadline.v1 import leadline_pb2  # noqa: E402

__all__ = [
    "FULL",
    "QUICK",
    "SECTION",
    "Figure",
    "Row",
    "ServerProcess",
    "SyntheticPool",
    "SystemConfig",
    "SystemReport",
    "format_table",
    "main",
    "make_pool_data",
    "run_system_benchmark",
]

_LOG = logging.getLogger("benchmarks.system")
_T = TypeVar("_T")

SECTION = "system-benchmark"
POOL_ID = "parcel-sorting"
LABELER = "bench-vendor"
SEGMENT_NAMES = ("hall-a", "hall-b", "hall-c", "hall-d")
# The server's default defensive floor (docs/operations.md); the bare draws use the same.
SELECTION_FLOOR = DEFAULT_FLOOR  # the server default
CONFIDENCE = 0.95
_METRICS = re.compile(r"metrics on (http://\S+:\d+/metrics)")
_ARRIVAL_STEP_MS = 50  # one parcel every 50 ms
_START_TIME_MS = 1_780_000_000_000
_SCORE_CHUNK = 100_000  # rows per Surrogate.score call in the bare refit (bounded memory)
_POLL_SECONDS = 0.02


@dataclass(frozen=True, kw_only=True)
class SystemConfig:
    """Sizes and repetitions of one run."""

    items: int
    feature_dim: int = 32
    num_classes: int = 10
    batch_rows: int = 2_000
    acquire_counts: tuple[int, ...] = (10, 100)
    acquire_calls: int = 30  # AcquireItems calls per count (>= 30 for the real runs)
    estimate_calls: int = 30  # samples of each GetEstimate figure
    refit_every_labels: int = 500  # the pool's refit trigger: refit k happens at k * this
    refits: int = 1
    seed: int = 20_261_202
    startup_timeout: float = 120.0
    refit_timeout: float = 900.0

    def __post_init__(self) -> None:
        if self.items < self.batch_rows or self.batch_rows < 1:
            raise ValueError(
                f"items == {self.items}, batch_rows == {self.batch_rows}: need "
                "1 <= batch_rows <= items."
            )
        for name in ("acquire_calls", "estimate_calls", "refit_every_labels", "refits"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} == {getattr(self, name)}: must be >= 1.")
        drawn = self.acquire_calls * sum(self.acquire_counts) + self.estimate_calls
        if drawn > self.items:
            raise ValueError(
                f"acquire_calls * sum(acquire_counts) + estimate_calls == {drawn} draws, "
                f"must be <= items = {self.items}."
            )
        labels = self.refits * self.refit_every_labels
        if labels > self.acquire_calls * sum(self.acquire_counts):
            raise ValueError(
                f"refits * refit_every_labels = {labels} labels: must be <= the "
                f"{self.acquire_calls * sum(self.acquire_counts)} items the acquire phase draws."
            )

    @property
    def raw_bytes_per_item(self) -> int:
        """float32 features + float32 class probabilities of one item."""
        return 4 * (self.feature_dim + self.num_classes)


FULL = SystemConfig(
    items=1_000_000, acquire_calls=100, estimate_calls=60, refit_every_labels=1_000, refits=3
)
QUICK = SystemConfig(
    items=100_000, acquire_calls=30, estimate_calls=30, refit_every_labels=500, refits=2
)


# ---------------------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Figure:
    """One measured value and how it is shown (``text``: e.g. 'median / p95')."""

    value: float
    text: str


@dataclass(frozen=True)
class Row:
    """One line of the table: a leadline figure beside a bare-library figure."""

    measurement: str
    leadline: Figure
    baseline_name: str
    baseline: Figure

    @property
    def ratio(self) -> float:
        """leadline / baseline (of the values, e.g. medians)."""
        return self.leadline.value / self.baseline.value


@dataclass
class SystemReport:
    config: SystemConfig
    rows: list[Row] = field(default_factory=list)
    scaling: str = ""  # the scaling table (Markdown), if run
    mixed: str = ""  # the mixed-load table (Markdown), if run
    scaling_notes: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    wall_seconds: float = 0.0
    load_before: str = ""  # /proc/loadavg (1, 5, 15 minutes) when the run started
    load_after: str = ""
    code: str = ""  # the commit measured (see _code_version)


def _latency(samples: Sequence[float]) -> Figure:
    """Median / p95 of latencies given in seconds, shown in ms."""
    values = np.asarray(samples, dtype=np.float64) * 1000.0
    median = float(np.median(values))
    p95 = float(np.percentile(values, 95))
    return Figure(median, f"{_ms(median)} / {_ms(p95)} ms")


def _ms(value: float) -> str:
    return f"{value:.3g}" if value < 100 else f"{value:,.0f}"


def _seconds(value: float) -> Figure:
    return Figure(value, f"{value:.2f} s")


def _rate(rows_per_second: float) -> Figure:
    return Figure(rows_per_second, f"{rows_per_second:,.0f} rows/s")


def _bytes_per_item(value: float) -> Figure:
    return Figure(value, f"{value:,.0f} B/item")


def format_table(rows: Sequence[Row]) -> str:
    """A Markdown table: measurement, leadline, baseline, baseline figure, ratio."""
    lines = [
        "| measurement | leadline server | bare-library baseline | baseline | "
        "ratio (leadline / baseline) |",
        "|---|---:|---|---:|---:|",
    ]
    for row in rows:
        lines.append(
            f"| {row.measurement} | {row.leadline.text} | {row.baseline_name} | "
            f"{row.baseline.text} | {row.ratio:.3g} |"
        )
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------
# data
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SyntheticPool:
    """n parcels: ids, features, the model's probabilities, true classes, segments, times."""

    item_ids: list[str]
    features: np.ndarray  # (n, d) float32
    outputs: np.ndarray  # (n, K) float32, rows sum to 1
    labels: np.ndarray  # (n,) int64, drawn from the true class probabilities
    segment_codes: np.ndarray  # (n,) int64 into SEGMENT_NAMES
    event_time_ms: np.ndarray  # (n,) int64, increasing

    @property
    def segments(self) -> list[str]:
        return [SEGMENT_NAMES[code] for code in self.segment_codes.tolist()]

    def row_of(self, item_id: str) -> int:
        return int(item_id.rsplit("-", 1)[1])


def _softmax(logits: np.ndarray) -> np.ndarray:
    shifted = logits - logits.max(axis=1, keepdims=True)
    exp = np.exp(shifted)
    return exp / exp.sum(axis=1, keepdims=True)


def make_pool_data(n: int, *, feature_dim: int, num_classes: int, seed: int) -> SyntheticPool:
    """The invented parcel-sorting pool (see the module docstring); deterministic in seed."""
    rng = np.random.default_rng(seed)
    features = rng.standard_normal((n, feature_dim), dtype=np.float32)
    weights = rng.standard_normal((feature_dim, num_classes)) / np.sqrt(feature_dim)
    outputs = np.empty((n, num_classes), dtype=np.float32)
    labels = np.empty(n, dtype=np.int64)
    for start in range(0, n, 200_000):
        part = slice(start, min(n, start + 200_000))
        true_logits = 2.0 * (features[part].astype(np.float64) @ weights)
        true_probs = _softmax(true_logits)
        noise = rng.normal(0.0, 0.5, size=true_logits.shape)
        outputs[part] = _softmax(1.6 * true_logits + noise)
        cdf = np.cumsum(true_probs, axis=1)
        draws = rng.random((cdf.shape[0], 1))
        labels[part] = np.minimum((cdf < draws).sum(axis=1), num_classes - 1)
    outputs /= outputs.sum(axis=1, keepdims=True)
    return SyntheticPool(
        item_ids=[f"parcel-{i:07d}" for i in range(n)],
        features=features,
        outputs=outputs,
        labels=labels,
        segment_codes=rng.integers(len(SEGMENT_NAMES), size=n).astype(np.int64),
        event_time_ms=_START_TIME_MS + _ARRIVAL_STEP_MS * np.arange(n, dtype=np.int64),
    )


# ---------------------------------------------------------------------------------------
# the server child process
# ---------------------------------------------------------------------------------------
class ServerProcess(LocalServer):
    """``leadline serve`` on 127.0.0.1 port 0 with its data and token file under workdir
    (the client's ``LocalServer``), plus what the benchmark reads from the process: CPU
    time, resident memory and the server-side call times on its metrics page.

    The token holds every role, so one client does everything.
    """

    def __init__(
        self, workdir: Path, *, extra_args: Sequence[str] = (), startup_timeout: float = 120.0
    ) -> None:
        self.token = "bench-" + secrets.token_hex(16)
        super().__init__(
            workdir,
            tokens={self.token: ("admin", "ingest", "labeler", "reader")},
            # Server-side call times (the request histogram's sums) split transport from work.
            extra_args=["--metrics-listen", "127.0.0.1:0", *extra_args],
            startup_timeout=startup_timeout,
        )
        self.returncode: int | None = None

    def __enter__(self) -> ServerProcess:
        self.start()
        return self

    def stop(self, *, timeout: float = 60.0) -> int | None:
        """SIGTERM and wait (SIGKILL after ``timeout``); the exit code, also kept."""
        self.returncode = super().stop(timeout=timeout)
        return self.returncode

    def _proc_file(self, name: str) -> str:
        if self.pid is None:
            raise RuntimeError("server not started")
        return Path(f"/proc/{self.pid}/{name}").read_text(encoding="ascii")

    def cpu_seconds(self) -> float:
        """User + system CPU time of the server process so far (/proc/PID/stat)."""
        stat = self._proc_file("stat")
        fields = stat.rsplit(")", 1)[1].split()
        # Fields 14 and 15 of proc(5) (utime, stime); fields[0] here is field 3.
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def handler_seconds(self) -> dict[str, tuple[float, int]]:
        """Per gRPC method: (sum of server-side call seconds, calls) from the metrics page.

        Scraping computes the whole-pool estimate for the pool gauges, so call this only
        between phases, never between a change and the call that should find no cache."""
        match = _METRICS.search(self.log())
        if match is None:
            raise RuntimeError("the server did not log its metrics address")
        with urllib.request.urlopen(match.group(1), timeout=60) as reply:
            text = reply.read().decode("utf-8")
        sums: dict[str, float] = {}
        counts: dict[str, int] = {}
        for line in text.splitlines():
            found = re.match(
                r'leadline_request_seconds_(sum|count)\{method="([^"]+)"\} (\S+)', line
            )
            if found:
                kind, method, value = found.groups()
                name = method.rsplit("/", 1)[-1]
                if kind == "sum":
                    sums[name] = float(value)
                else:
                    counts[name] = int(float(value))
        return {name: (sums.get(name, 0.0), counts.get(name, 0)) for name in counts}

    def rss_bytes(self) -> int:
        """Resident memory of the server process (VmRSS of /proc/PID/status)."""
        status = self._proc_file("status")
        match = re.search(r"^VmRSS:\s+(\d+)\s+kB", status, re.MULTILINE)
        if match is None:
            raise RuntimeError(f"no VmRSS line in /proc/{self.pid}/status")
        return int(match.group(1)) * 1024


# ---------------------------------------------------------------------------------------
# measurements
# ---------------------------------------------------------------------------------------
def _timed(call: Callable[[], object]) -> float:
    started = time.perf_counter()
    call()
    return time.perf_counter() - started


class _Meter:
    """Times calls to the server: wall seconds per call, plus the CPU seconds this
    process (the client) and the server process spent while they ran, plus the time the
    server's own handler took (from its metrics page, scraped before and after)."""

    def __init__(self, server: ServerProcess) -> None:
        self._server = server
        self._handlers = server.handler_seconds()
        self.samples: list[float] = []
        self.client_cpu = 0.0
        self.server_cpu = 0.0

    def __call__(self, call: Callable[[], _T]) -> _T:
        client, server = time.process_time(), self._server.cpu_seconds()
        started = time.perf_counter()
        result = call()
        self.samples.append(time.perf_counter() - started)
        self.client_cpu += time.process_time() - client
        self.server_cpu += self._server.cpu_seconds() - server
        return result

    def summary(self, method: str, what: str) -> str:
        """One sentence for the notes (scrapes the metrics page: call between phases)."""
        total, calls = self._server.handler_seconds().get(method, (0.0, 0))
        total0, calls0 = self._handlers.get(method, (0.0, 0))
        wall = sum(self.samples)
        text = (
            f"{what}: {len(self.samples)} calls, {wall:.2f} s in total; CPU meanwhile: "
            f"server {self.server_cpu:.2f} s, client {self.client_cpu:.2f} s"
        )
        if calls > calls0:
            text += (
                f"; mean per call {1000 * wall / len(self.samples):.3g} ms seen by the client,"
                f" {1000 * (total - total0) / (calls - calls0):.3g} ms in the server's handler"
            )
        return text + "."


def ingest_batch(client: Client, data: SyntheticPool, segments: list[str], part: slice) -> None:
    """Rows ``part`` through IngestItems as one message (client-side building included)."""
    result = client.ingest(
        POOL_ID,
        data.item_ids[part],
        data.features[part],
        data.outputs[part],
        segments=segments[part],
        event_time_ms=data.event_time_ms[part],
    )
    expected = part.stop - part.start
    if result.accepted != expected or result.messages != 1:
        raise RuntimeError(
            f"ingest of rows {part.start}..{part.stop}: accepted {result.accepted} in "
            f"{result.messages} messages, expected {expected} in 1"
        )


class BareSqlite:
    """Bare stdlib sqlite3: the same rows (id, float32 blobs, segment, time) in WAL mode
    with synchronous=FULL, one transaction per :meth:`insert` call."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._connection = sqlite3.connect(path, isolation_level=None)
        self._connection.execute("PRAGMA journal_mode=WAL")
        self._connection.execute("PRAGMA synchronous=FULL")
        self._connection.execute(
            "CREATE TABLE items (row INTEGER PRIMARY KEY, item_id TEXT NOT NULL, "
            "features BLOB NOT NULL, outputs BLOB NOT NULL, segment TEXT NOT NULL, "
            "event_time_ms INTEGER NOT NULL)"
        )

    def insert(self, data: SyntheticPool, segments: list[str], part: slice) -> None:
        rows = [
            (
                i,
                data.item_ids[i],
                data.features[i].tobytes(),
                data.outputs[i].tobytes(),
                segments[i],
                int(data.event_time_ms[i]),
            )
            for i in range(part.start, part.stop)
        ]
        self._connection.execute("BEGIN")
        self._connection.executemany("INSERT INTO items VALUES (?, ?, ?, ?, ?, ?)", rows)
        self._connection.execute("COMMIT")

    def close(self) -> None:
        """Close and delete the database files."""
        self._connection.close()
        for suffix in ("", "-wal", "-shm"):
            Path(f"{self.path}{suffix}").unlink(missing_ok=True)


def _estimate_terms(
    spec: LossSpec,
    data: SyntheticPool,
    scores: SurrogateScores,
    *,
    draws: int,
    labeled: int,
    rng: np.random.Generator,
) -> tuple[DrawTerms, PlugInSums]:
    """Core inputs with the server's number of draws, built as the server builds them
    (its ledger): ``draws`` draws over the pool's cold scores, the first ``labeled`` of
    them labeled with the true classes."""
    n = len(data.item_ids)
    ledger = DrawLedger()
    selection = select(
        scores, draws, reliance=Reliance(floor=SELECTION_FLOOR), loss_bound=spec.bound, rng=rng
    )
    rows = selection.positions
    ledger.record(selection, rows=rows, surrogate_version=0, arrival_mark=n)
    first = rows[:labeled]
    ledger.set_labels(
        np.arange(labeled),
        data.labels[first].astype(np.float64),
        spec.losses(data.outputs[first].astype(np.float64), data.labels[first]),
    )
    unlabeled = np.ones(n, dtype=bool)
    unlabeled[first] = False
    terms = ledger.terms(
        item_count=n, cold_expected_loss=scores.expected_loss, loss_bound=spec.bound
    )
    sums = ledger.plug_in_sums(
        unlabeled=unlabeled,
        expected_loss=scores.expected_loss,
        second_moment=scores.residual_second_moment,
    )
    return terms, sums


def bare_refit_seconds(
    spec: LossSpec, data: SyntheticPool, rows: np.ndarray, *, version: int, seed: int
) -> tuple[float, float]:
    """(fit seconds, scoring seconds): ``fit_surrogate`` on the labeled rows with the
    server's default refit threads (1), then ``Surrogate.score`` over every item."""
    started = time.perf_counter()
    surrogate = fit_surrogate(
        spec,
        data.features[rows],
        data.outputs[rows],
        data.labels[rows],
        version=version,
        seed=seed,
        settings=SurrogateSettings(num_threads=1),
    )
    fitted = time.perf_counter()
    n = len(data.item_ids)
    for start in range(0, n, _SCORE_CHUNK):
        part = slice(start, start + _SCORE_CHUNK)
        surrogate.score(data.features[part], data.outputs[part])
    return fitted - started, time.perf_counter() - fitted


def _wait_for_version(client: Client, above: int, timeout: float) -> tuple[float, int]:
    deadline = time.perf_counter() + timeout
    while time.perf_counter() < deadline:
        pool = client.get_pool(POOL_ID)
        if pool.surrogate_version > above:
            return time.perf_counter(), int(pool.surrogate_version)
        time.sleep(_POLL_SECONDS)
    raise RuntimeError(f"surrogate_version stayed <= {above} for {timeout} s")


def _progress(message: str) -> None:
    print(f"  {message}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------------------
@dataclass
class _Run:
    """What the phases share: config, data, the server, its client, the report."""

    config: SystemConfig
    data: SyntheticPool
    spec: LossSpec
    server: ServerProcess
    client: Client
    report: SystemReport
    rng: np.random.Generator
    say: Callable[[str], None]
    segments: list[str] = field(default_factory=list)
    assignments: list[leadline_pb2.Assignment] = field(default_factory=list)
    rss: list[tuple[str, int]] = field(default_factory=list)

    @property
    def n(self) -> int:
        return self.config.items

    def mark_memory(self, when: str) -> int:
        rss = self.server.rss_bytes()
        self.rss.append((when, rss))
        return rss


def _ingest_phase(run: _Run, workdir: Path) -> None:
    """Each batch goes to the bare database, then to the server: load drift on the shared
    machine hits both sides alike."""
    config, data = run.config, run.data
    meter = _Meter(run.server)
    bare = BareSqlite(workdir / "bare-sqlite.db")
    bare_samples = []
    try:
        for start in range(0, run.n, config.batch_rows):
            part = slice(start, min(run.n, start + config.batch_rows))
            bare_samples.append(_timed(partial(bare.insert, data, run.segments, part)))
            meter(partial(ingest_batch, run.client, data, run.segments, part))
    finally:
        bare.close()
    samples = meter.samples
    rate, bare_rate = run.n / sum(samples), run.n / sum(bare_samples)
    run.report.rows.append(
        Row(
            f"ingest, {config.batch_rows:,}-row batches, {config.feature_dim} features, "
            f"{config.num_classes} classes",
            _rate(rate),
            "sqlite3 insert of the same rows (float32 blobs), WAL, synchronous=FULL, "
            f"one transaction per {config.batch_rows:,} rows",
            _rate(bare_rate),
        )
    )
    notes = run.report.notes
    notes.append(meter.summary("IngestItems", f"IngestItems ({config.batch_rows:,} rows each)"))
    ms, bare_ms = np.asarray(samples) * 1000.0, np.asarray(bare_samples) * 1000.0
    notes.append(
        f"Time per {config.batch_rows:,}-row batch, median / p95 / max: leadline "
        f"{np.median(ms):.1f} / {np.percentile(ms, 95):.1f} / {ms.max():.0f} ms, sqlite3 "
        f"{np.median(bare_ms):.1f} / {np.percentile(bare_ms, 95):.1f} / {bare_ms.max():.0f} ms."
    )
    tenth = max(1, len(samples) // 10)
    rows = tenth * config.batch_rows
    notes.append(
        f"Ingest rate over the first / last tenth of the batches: "
        f"{rows / sum(samples[:tenth]):,.0f} / {rows / sum(samples[-tenth:]):,.0f} rows/s "
        f"(leadline), {rows / sum(bare_samples[:tenth]):,.0f} / "
        f"{rows / sum(bare_samples[-tenth:]):,.0f} rows/s (sqlite3)."
    )
    run.say(f"ingest: {rate:,.0f} rows/s (bare sqlite3 {bare_rate:,.0f})")


def _acquire_phase(run: _Run, scores: SurrogateScores) -> None:
    """Server call, numpy draw, core draw, in turn, ``acquire_calls`` times per count."""
    config, rng = run.config, run.rng
    probabilities = selection_probabilities(usefulness(scores), floor=SELECTION_FLOOR)
    useful = usefulness(scores)
    for count in config.acquire_counts:
        meter = _Meter(run.server)
        numpy_samples, core_samples = [], []
        for _ in range(config.acquire_calls):
            got = meter(partial(run.client.acquire, POOL_ID, count, labeler=LABELER))
            if len(got) != count:
                raise RuntimeError(f"AcquireItems({count}) returned {len(got)} items")
            run.assignments.extend(got)
            numpy_samples.append(
                _timed(partial(rng.choice, run.n, size=count, replace=False, p=probabilities))
            )
            core_samples.append(
                _timed(
                    partial(
                        draw_batch,
                        useful,
                        scores.expected_loss,
                        count,
                        floor=SELECTION_FLOOR,
                        loss_bound=run.spec.bound,
                        rng=rng,
                        groups=run.data.segment_codes,  # one group per segment, as the server
                        num_groups=len(SEGMENT_NAMES),
                    )
                )
            )
        label = (
            f"AcquireItems, count {count}, {run.n:,}-item pool, median / p95 of "
            f"{config.acquire_calls} calls"
        )
        figure = _latency(meter.samples)
        run.report.rows.append(
            Row(
                label,
                figure,
                f"numpy Generator.choice(p=..., replace=False), {count} of {run.n:,} weights",
                _latency(numpy_samples),
            )
        )
        run.report.rows.append(
            Row(
                label,
                figure,
                "core draw_batch alone (same scores, floor, segments)",
                _latency(core_samples),
            )
        )
        run.report.notes.append(meter.summary("AcquireItems", f"AcquireItems count {count}"))
        run.say(f"acquire {count}: {figure.text}")


def _submit_true_labels(run: _Run, assignments: Sequence[leadline_pb2.Assignment]) -> None:
    data = run.data
    for start in range(0, len(assignments), 1_000):
        part = assignments[start : start + 1_000]
        run.client.submit_labels(
            POOL_ID,
            {a.assignment_id: int(data.labels[data.row_of(a.item_id)]) for a in part},
            labeler=LABELER,
        )


def _refit_phase(run: _Run) -> None:
    """Refit k is triggered by label k * refit_every_labels; the bare fit + scoring on the
    same rows runs before the server's refit for odd k, after it for even k."""
    config = run.config
    labeled_rows: list[int] = []
    version = run.client.get_pool(POOL_ID).surrogate_version
    for k in range(1, config.refits + 1):
        target = k * config.refit_every_labels
        chunk = run.assignments[len(labeled_rows) : target]
        labeled_rows.extend(run.data.row_of(a.item_id) for a in chunk)
        _submit_true_labels(run, chunk[:-1])
        if run.client.get_pool(POOL_ID).surrogate_version != version:
            raise RuntimeError("a refit started before the triggering label")

        def bare(k: int = k) -> tuple[float, float]:
            return bare_refit_seconds(
                run.spec, run.data, np.array(labeled_rows), version=k, seed=config.seed + k
            )

        if k % 2:
            fit_s, score_s = bare()
        clock = time.perf_counter()
        _submit_true_labels(run, chunk[-1:])
        done, version = _wait_for_version(run.client, version, config.refit_timeout)
        run.mark_memory(f"after refit {k}")
        if not k % 2:
            fit_s, score_s = bare()
        run.report.rows.append(
            Row(
                f"refit + rescoring of {run.n:,} items after {target:,} labels (label sent "
                "-> Pool.surrogate_version increased)",
                _seconds(done - clock),
                "core fit_surrogate + Surrogate.score of every item, same arrays",
                _seconds(fit_s + score_s),
            )
        )
        run.report.notes.append(
            f"Bare refit after {target:,} labels: fit_surrogate {fit_s:.2f} s, "
            f"Surrogate.score of {run.n:,} items {score_s:.2f} s."
        )
        run.say(f"refit {k}: {done - clock:.2f} s (bare {fit_s + score_s:.2f} s)")


def _estimate_phase(run: _Run, scores: SurrogateScores) -> None:
    """Per repetition: one AcquireItems(1) (a change: every cached estimate goes), then
    per scope a first and a cached GetEstimate, then one bare estimate_risk."""
    config, client = run.config, run.client
    times = run.data.event_time_ms
    window = (int(times[run.n // 3]), int(times[2 * run.n // 3]))
    scopes: dict[str, dict[str, Any]] = {
        "whole pool": {},
        f"segment {SEGMENT_NAMES[0]!r}": {"segment": SEGMENT_NAMES[0]},
        "time window (middle third)": {"start_time_ms": window[0], "end_time_ms": window[1]},
    }
    pool = client.get_pool(POOL_ID)
    draws, labeled = int(pool.draw_count) + config.estimate_calls, int(pool.labeled_count)
    terms, sums = _estimate_terms(
        run.spec, run.data, scores, draws=draws, labeled=labeled, rng=run.rng
    )
    first: dict[str, list[float]] = {name: [] for name in scopes}
    cached: dict[str, list[float]] = {name: [] for name in scopes}
    core: list[float] = []
    for _ in range(config.estimate_calls):
        client.acquire(POOL_ID, 1, labeler=LABELER)
        for name, scope in scopes.items():
            first[name].append(_timed(partial(client.get_estimate, POOL_ID, **scope)))
            cached[name].append(_timed(partial(client.get_estimate, POOL_ID, **scope)))
        core.append(
            _timed(
                lambda: estimate_risk(
                    terms,
                    sums,
                    mode=EstimatorMode.BALANCED,
                    confidence=CONFIDENCE,
                    loss_bound=run.spec.bound,
                )
            )
        )
    whole = client.get_estimate(POOL_ID)
    if whole.labels_used != labeled or whole.items_in_scope != run.n:
        raise RuntimeError(f"unexpected whole-pool estimate: {whole}")
    if whole.labels_pending + whole.labels_used != draws:
        raise RuntimeError(
            f"the server holds {whole.labels_pending} pending draws, expected {draws - labeled}"
        )
    baseline = f"core estimate_risk alone (BALANCED), {draws:,} draws, {labeled:,} labeled"
    for name in scopes:
        for kind, samples in (("cached", cached[name]), ("first after a change", first[name])):
            run.report.rows.append(
                Row(
                    f"GetEstimate, {name}, {kind}, median / p95 of {len(samples)}",
                    _latency(samples),
                    baseline,
                    _latency(core),
                )
            )
    run.say("estimates done")


def _memory_rows(run: _Run, empty: int, ingested: int, end: int) -> None:
    config = run.config
    raw = Figure(float(config.raw_bytes_per_item), f"{config.raw_bytes_per_item} B/item")
    raw_name = (
        f"raw arrays: float32 features + outputs ({config.feature_dim} + "
        f"{config.num_classes}) x 4 B"
    )
    draws = run.client.get_pool(POOL_ID).draw_count
    run.report.rows.append(
        Row(
            "server resident memory per item after ingest (VmRSS growth / items)",
            _bytes_per_item((ingested - empty) / run.n),
            raw_name,
            raw,
        )
    )
    run.report.rows.append(
        Row(
            f"... at the end ({draws:,} draws, {config.refits} refits)",
            _bytes_per_item((end - empty) / run.n),
            raw_name,
            raw,
        )
    )
    run.report.notes.append(
        "Server VmRSS: "
        + ", ".join(f"{rss / 2**20:,.0f} MiB {when}" for when, rss in run.rss)
        + "."
    )


def run_system_benchmark(
    config: SystemConfig, workdir: Path, *, progress: bool = True
) -> SystemReport:
    """Every measurement of the table. Phases run one after the other (no refit runs
    while latencies are taken); within a phase, server calls and bare figures alternate."""
    say = _progress if progress else (lambda _message: None)
    started = time.perf_counter()
    report = SystemReport(config=config, load_before=_load_average(), code=_code_version())
    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=config.num_classes)
    data = make_pool_data(
        config.items,
        feature_dim=config.feature_dim,
        num_classes=config.num_classes,
        seed=config.seed,
    )
    say(f"data: {config.items:,} items generated")
    server = ServerProcess(
        workdir / "server",
        # Only the label count triggers refits, so each refit is the one we time, and no
        # CPU-share wait after the previous one is counted in it (the scaling runs keep the
        # default cadence).
        extra_args=[
            "--refit-interval-seconds",
            "1000000",
            "--refit-cpu-share",
            "1",
            "--draw-seed",
            str(config.seed),
        ],
        startup_timeout=config.startup_timeout,
    )
    with (
        server,
        Client(
            server.target,
            token=server.token,
            timeout=120.0,
            max_batch_rows=config.batch_rows,
            max_batch_bytes=16 << 20,
        ) as client,
    ):
        client.create_pool(
            POOL_ID,
            task="classification",
            feature_dim=config.feature_dim,
            num_classes=config.num_classes,
            loss="zero-one",
            refit_every_labels=config.refit_every_labels,
        )
        run = _Run(
            config=config,
            data=data,
            spec=spec,
            server=server,
            client=client,
            report=report,
            rng=np.random.default_rng(config.seed),
            say=say,
            segments=data.segments,
        )
        empty = run.mark_memory("with the empty pool")
        _ingest_phase(run, workdir)
        ingested = run.mark_memory("after ingest")
        # The server's scores before the first refit: the core's label-free cold start.
        scores = cold_start_surrogate(spec).score(data.features, data.outputs)
        _acquire_phase(run, scores)
        run.mark_memory("after the acquire phase")
        _refit_phase(run)
        _estimate_phase(run, scores)
        end = run.mark_memory("at the end")
        _memory_rows(run, empty, ingested, end)
    if server.returncode != 0:
        raise RuntimeError(
            f"leadline serve exited with {server.returncode}:\n{server.log()[-4000:]}"
        )
    refit_lines = [
        line.split("refit pool ", 1)[1]
        for line in server.log().splitlines()
        if "refit pool " in line
    ]
    if refit_lines:
        report.notes.append("Server's own refit log: " + "; ".join(refit_lines) + ".")
    report.load_after = _load_average()
    report.wall_seconds = time.perf_counter() - started
    return report


def _load_average() -> str:
    try:
        return " ".join(Path("/proc/loadavg").read_text().split()[:3])
    except OSError:
        return "unknown"


# ---------------------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------------------
def _machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        nproc = subprocess.run(["nproc"], capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        nproc = "unknown"
    memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (
        f"{cpu}, {os.cpu_count()} cores (`nproc` = {nproc}), {memory:.0f} GiB, "
        f"{platform.system()} {platform.release()}"
    )


def _versions() -> str:
    import grpc
    import lightgbm

    return (
        f"Python {platform.python_version()}, numpy {np.__version__}, SQLite "
        f"{sqlite3.sqlite_version}, grpcio {grpc.__version__}, LightGBM {lightgbm.__version__}"
    )


def _code_version() -> str:
    """The commit measured, and whether the server or client code differed from it."""
    try:
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            cwd=_ROOT,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        changed = subprocess.run(
            ["git", "status", "--porcelain", "--", "service", "client", "proto"],
            cwd=_ROOT,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.split("\n")
    except (OSError, subprocess.CalledProcessError):
        return "unknown (no git)"
    files = sorted({line[3:] for line in changed if line.strip()})
    if not files:
        return f"commit {commit}"
    return f"commit {commit} with uncommitted changes in {', '.join(files)}"


def render_section(report: SystemReport, *, command: str, quick: bool) -> str:
    """The Markdown body of the system section."""
    config = report.config
    date = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    lines = [
        f"## System benchmark{' (QUICK)' if quick else ''}",
        "",
        f"- Command: `{command}`",
        f"- Date: {date}",
        f"- Machine: {_machine()}",
        f"- Code: {report.code}",
        f"- Software: {_versions()}",
        f"- Wall time: {report.wall_seconds / 60:.1f} minutes; load average (1, 5, 15 min) "
        f"{report.load_before} at the start, {report.load_after} at the end",
        f"- Pool: {config.items:,} items, {config.feature_dim} float32 features, "
        f"{config.num_classes}-class probabilities, zero-one loss, {len(SEGMENT_NAMES)} "
        f"segments; refit after every {config.refit_every_labels:,} labels.",
        "",
        "One `leadline serve` child process (fresh data directory, token auth, defaults "
        "otherwise: one refit thread) and the benchmark process with the real client share "
        "the machine. The bare figures run in the benchmark process while the server is "
        "idle, alternating with the server calls (ingest batch by batch, AcquireItems and "
        "GetEstimate call by call; the bare refit before the server's for odd refits, "
        "after it for even ones), so that load from other processes hits both sides "
        "alike. Ratios are leadline / baseline of the same run: above 1 means leadline "
        "takes longer, or for the ingest rate, is faster. Latencies are wall-clock times "
        "seen by the client, median / p95 in ms; the ratio uses the medians. Absolute "
        "times on this shared machine are noisy; compare ratios.",
        "",
        format_table(report.rows),
        "",
    ]
    if report.notes:
        lines += ["Details measured in the same run:", ""]
        lines += [f"- {note}" for note in report.notes]
        lines.append("")
    if report.scaling:
        lines += [
            "### Scaling",
            "",
            "One fresh server per size with the default settings (refit cadence included: "
            "every 10 labels, refits at most a quarter of one core); a labeling run of "
            "rounds of AcquireItems(10), SubmitLabels, then one fresh GetEstimate or "
            "CheckGate (alternating), with the floors timed in every round "
            "(benchmarks/system_scaling.py describes each figure).",
            "",
            report.scaling,
            "",
        ]
        lines += [f"- {note}" for note in report.scaling_notes]
        lines.append("")
    if report.mixed:
        lines += [
            "### Under load",
            "",
            "The main size's server after its labeling run, 8 clients at once, each on its "
            "own channel: 2 ingesters (a 2,000-row batch of new items every 0.5 s each), 4 "
            "labelers (AcquireItems(10) + SubmitLabels back to back), 2 gate pollers "
            "(CheckGate + GetEstimate back to back).",
            "",
            report.mixed,
            "",
        ]
    return "\n".join(lines)


def _command(argv: Sequence[str] | None) -> str:
    """The command line as run from the repository root (interpreter path relative)."""
    interpreter = Path(sys.executable)
    try:
        shown = str(interpreter.relative_to(_ROOT))
    except ValueError:
        shown = "python"
    args = list(sys.argv[1:] if argv is None else argv)
    return shlex.join([shown, "benchmarks/system.py", *args])


def _parse(argv: Sequence[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100,000 items, fewer repetitions")
    parser.add_argument("--items", type=int, default=None, help="override the pool size")
    parser.add_argument("--output", type=Path, default=None, help="markdown file to write")
    parser.add_argument("--workdir", type=Path, default=None, help="keep server files here")
    parser.add_argument(
        "--sizes",
        default=None,
        help="comma-separated pool sizes of the scaling table (default: 100000 for --quick, "
        "100000,1000000,10000000 for the full run); 0 = skip it",
    )
    return parser.parse_args(argv)


def _scaling(
    args: argparse.Namespace, quick: bool, main_size: int, workdir: Path
) -> tuple[str, str, list[str]]:
    """The scaling table, the mixed-load table and their notes (empty if skipped)."""
    from benchmarks.system_scaling import (
        ScalingConfig,
        format_mixed_table,
        format_scaling_table,
        run_scaling,
    )

    text = args.sizes or ("100000" if quick else "100000,1000000,10000000")
    sizes = tuple(int(part) for part in text.split(",") if int(part) > 0)
    if not sizes:
        return "", "", []
    config = ScalingConfig(
        sizes=sizes,
        main_size=main_size if main_size in sizes else sizes[0],
        label_seconds=15.0 if quick else 60.0,
        mixed_seconds=15.0 if quick else 60.0,
    )
    results, mixed = run_scaling(config, workdir, _progress)
    notes = [f"{r.items:,} items: {r.rss_notes}." for r in results]
    return format_scaling_table(results), format_mixed_table(mixed), notes


def main(argv: Sequence[str] | None = None) -> int:
    args = _parse(argv)
    logging.basicConfig(level=logging.WARNING)
    quick = bool(args.quick)
    config = QUICK if quick else FULL
    if args.items is not None:
        config = SystemConfig(**{**config.__dict__, "items": args.items})
    output = args.output or (
        _ROOT / "bench-out" / "system-quick.md" if quick else _ROOT / "BENCHMARKS.md"
    )
    print(f"system benchmark ({'QUICK: ' if quick else ''}{config.items:,} items)", flush=True)
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="leadline-system-") as tmp:
        workdir = args.workdir or Path(tmp)
        (workdir / "detail").mkdir(parents=True, exist_ok=True)
        report = run_system_benchmark(config, workdir / "detail")
        report.scaling, report.mixed, report.scaling_notes = _scaling(
            args, quick, config.items, workdir
        )
    report.wall_seconds = time.perf_counter() - started
    print()
    print(format_table(report.rows))
    for note in report.notes:
        print(f"- {note}")
    if report.scaling:
        print()
        print(report.scaling)
        for note in report.scaling_notes:
            print(f"- {note}")
    if report.mixed:
        print()
        print(report.mixed)
    body = render_section(report, command=_command(argv), quick=quick)
    output.parent.mkdir(parents=True, exist_ok=True)
    if not output.exists():
        output.write_text("# Benchmarks\n", encoding="utf-8")  # the title labels.py also uses
    replace_section(output, SECTION, body)
    print(f"\nwrote the {SECTION} section of {output} ({report.wall_seconds / 60:.1f} minutes)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
