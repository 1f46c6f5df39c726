"""Ingest and restart benchmark: a real leadline server beside bare sqlite3 on the same rows.

Run from the repository root:

    .venv/bin/python benchmarks/ingest.py                   # 100,000 and 1,000,000 items
    .venv/bin/python benchmarks/ingest.py --sizes 100000    # one size (writes bench-out/)

For each size, a fresh ``leadline serve`` child (``benchmarks.system.ServerProcess``: port
0, token auth, metrics) gets the invented parcel pool of :mod:`benchmarks.system` through
the real client in 2,000-row IngestItems calls. Batch by batch, the same rows also go to
two bare stdlib sqlite3 databases (WAL, ``synchronous=FULL``, one transaction and one
durable commit per batch), so load drift on the shared machine hits all three alike:

- **same layout** (the floor): leadline's own layout since schema 6, one ``item_chunks``
  row per batch with one blob per column (ids joined by line feeds, float32 features and
  outputs, int32 segment codes, int64 event and arrival times, payload refs);
- **one row per item** (for context): the layout of schema 1-5, ``items`` with a row per
  item (float32 blobs) and a (pool, row) primary key, which the issue's first floor used.

Then 20 items are labeled so that a fitted surrogate is in force, the server is stopped
(SIGTERM) and started again on the same data directory, and the restart is timed: the
server's own pool-load time from its log (reading SQLite, scoring the items with the
latest surrogate, building the in-memory pool) and the wall time from spawning the
process until the health service reports SERVING (interpreter start and imports
included). The floor is a bare sqlite3 read of the same rows, same layout, into numpy
arrays and a list of ids. Both reads run warm (the files were just written; the page
cache is not dropped on a shared machine).

``stage_profile`` times one in-process ingest stage by stage (client message building,
protobuf parse, validation, the engine's work under the pool lock, the commit) to say
where the time goes. The functions are importable: ``measure(n, workdir)`` returns the
figures of one size.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import re
import shlex
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

_ROOT = Path(__file__).resolve().parents[1]
if str(_ROOT) not in sys.path:  # run as a script: make `benchmarks` importable
    sys.path.insert(0, str(_ROOT))

from benchmarks.markdown import replace_section  # noqa: E402
from benchmarks.system import ServerProcess, SyntheticPool, make_pool_data  # noqa: E402
from leadline.client import Client  # noqa: E402

__all__ = [
    "SECTION",
    "IngestFigures",
    "RestartFigures",
    "SizeFigures",
    "bare_chunk_read",
    "main",
    "measure",
    "render_section",
    "stage_profile",
]

SECTION = "ingest-restart"
POOL_ID = "parcel-sorting"
LABELER = "bench-vendor"
FEATURE_DIM = 32
NUM_CLASSES = 10
BATCH_ROWS = 2_000
SEED = 20_261_202
_LOADED = re.compile(
    r"loaded pool \S+: (\d+) items, .* in ([0-9.]+) s \(scoring the items ([0-9.]+) s[,)]"
)
_CHECKED = re.compile(r"quick_check of \S+: ok in ([0-9.]+) s")

_CHUNK_TABLE = (
    "CREATE TABLE item_chunks (pool_id TEXT NOT NULL, start_row INTEGER NOT NULL, "
    "row_count INTEGER NOT NULL, item_ids BLOB NOT NULL, features BLOB NOT NULL, "
    "outputs BLOB NOT NULL, payload_refs BLOB NOT NULL, segments BLOB NOT NULL, "
    "event_time_ms BLOB NOT NULL, ingest_time_ms BLOB NOT NULL, "
    "PRIMARY KEY (pool_id, start_row))"
)
_ROW_TABLE = (
    "CREATE TABLE items (pool_id TEXT NOT NULL, row INTEGER NOT NULL, item_id TEXT NOT NULL, "
    "features BLOB NOT NULL, outputs BLOB NOT NULL, payload_ref TEXT NOT NULL, "
    "segment INTEGER NOT NULL, event_time_ms INTEGER NOT NULL, "
    "ingest_time_ms INTEGER NOT NULL, PRIMARY KEY (pool_id, row))"
)


# ---------------------------------------------------------------------------------------
# bare sqlite3
# ---------------------------------------------------------------------------------------
def _connect(path: Path) -> sqlite3.Connection:
    connection = sqlite3.connect(path, isolation_level=None)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=FULL")
    return connection


class _BareChunks:
    """The same rows in leadline's layout: one row per batch, one blob per column."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._connection = _connect(path)
        self._connection.execute(_CHUNK_TABLE)

    def insert(self, data: SyntheticPool, part: slice, now_ms: int) -> None:
        n = part.stop - part.start
        row = (
            POOL_ID,
            part.start,
            n,
            "\n".join(data.item_ids[part]).encode("utf-8"),
            data.features[part].tobytes(),
            data.outputs[part].tobytes(),
            ("\n" * (n - 1)).encode("utf-8"),  # no payload refs: n empty strings
            data.segment_codes[part].astype("<i4").tobytes(),
            data.event_time_ms[part].astype("<i8").tobytes(),
            np.full(n, now_ms, dtype="<i8").tobytes(),
        )
        self._connection.execute("BEGIN")
        self._connection.execute(
            "INSERT INTO item_chunks VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", row
        )
        self._connection.execute("COMMIT")

    def close(self) -> None:
        self._connection.close()


class _BareRows:
    """The same rows one per item, as schema 1-5 stored them (context, not the floor)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._connection = _connect(path)
        self._connection.execute(_ROW_TABLE)

    def insert(self, data: SyntheticPool, part: slice, now_ms: int) -> None:
        rows = [
            (
                POOL_ID,
                i,
                data.item_ids[i],
                data.features[i].tobytes(),
                data.outputs[i].tobytes(),
                "",
                int(data.segment_codes[i]),
                int(data.event_time_ms[i]),
                now_ms,
            )
            for i in range(part.start, part.stop)
        ]
        self._connection.execute("BEGIN")
        self._connection.executemany("INSERT INTO items VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", rows)
        self._connection.execute("COMMIT")

    def close(self) -> None:
        self._connection.close()


def bare_chunk_read(path: Path, *, feature_dim: int, output_width: int) -> float:
    """Seconds to read every chunk row into numpy columns and a list of ids (a fresh
    connection; the database file is warm in the page cache)."""
    started = time.perf_counter()
    connection = sqlite3.connect(path)
    try:
        rows = connection.execute(
            "SELECT start_row, row_count, item_ids, features, outputs, payload_refs, "
            "segments, event_time_ms, ingest_time_ms FROM item_chunks WHERE pool_id = ? "
            "ORDER BY start_row",
            (POOL_ID,),
        ).fetchall()
    finally:
        connection.close()
    n = sum(int(r[1]) for r in rows)
    ids = [s for r in rows for s in bytes(r[2]).decode("utf-8").split("\n")]
    refs = [s for r in rows for s in bytes(r[5]).decode("utf-8").split("\n")]
    features = np.frombuffer(b"".join(r[3] for r in rows), "<f4").reshape(n, feature_dim)
    outputs = np.frombuffer(b"".join(r[4] for r in rows), "<f4").reshape(n, output_width)
    columns = [np.frombuffer(b"".join(r[i] for r in rows), t) for i, t in ((6, "<i4"), (7, "<i8"))]
    columns.append(np.frombuffer(b"".join(r[8] for r in rows), "<i8"))
    elapsed = time.perf_counter() - started
    if len(ids) != n or len(refs) != n or features.shape[0] != n or outputs.shape[0] != n:
        raise RuntimeError("bare read: columns of different lengths")
    return elapsed


def _bare_row_read(path: Path, *, feature_dim: int, output_width: int) -> float:
    """Seconds to read the one-row-per-item table into the same columns."""
    started = time.perf_counter()
    connection = sqlite3.connect(path)
    try:
        rows = connection.execute(
            "SELECT row, item_id, features, outputs, payload_ref, segment, event_time_ms,"
            " ingest_time_ms FROM items WHERE pool_id = ? ORDER BY row",
            (POOL_ID,),
        ).fetchall()
    finally:
        connection.close()
    n = len(rows)
    ids = [r[1] for r in rows]
    features = np.frombuffer(b"".join(r[2] for r in rows), "<f4").reshape(n, feature_dim)
    outputs = np.frombuffer(b"".join(r[3] for r in rows), "<f4").reshape(n, output_width)
    refs = [r[4] for r in rows]
    segments = np.fromiter((r[5] for r in rows), np.int32, count=n)
    events = np.fromiter((r[6] for r in rows), np.int64, count=n)
    arrivals = np.fromiter((r[7] for r in rows), np.int64, count=n)
    elapsed = time.perf_counter() - started
    if len(ids) != len(refs) or features.shape[0] != outputs.shape[0] != segments.shape[0]:
        raise RuntimeError("bare read: columns of different lengths")
    del events, arrivals
    return elapsed


# ---------------------------------------------------------------------------------------
# figures
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class IngestFigures:
    """Seconds per batch of leadline (client call) and of the two bare inserts, and the
    server's own handler seconds (metrics page) over all batches."""

    items: int
    leadline: list[float]
    bare_chunks: list[float]
    bare_rows: list[float]
    handler_seconds: float
    server_cpu_seconds: float

    def rate(self, samples: Sequence[float]) -> float:
        return self.items / sum(samples)


@dataclass(frozen=True)
class RestartFigures:
    """A restart of the server on the ingested pool (surrogate version >= 1)."""

    items: int
    spawn_to_serving: float  # process start until health SERVING (client side)
    pool_load: float  # the server's log: the pool's rebuild from SQLite
    scoring: float  # ... of which scoring the items (cold + current surrogate)
    quick_check: float  # the server's log: SQLite's quick_check at open
    bare_read: float  # same layout, read into numpy
    bare_row_read: float  # one row per item, read into numpy (context)
    surrogate_version: int


@dataclass(frozen=True)
class SizeFigures:
    ingest: IngestFigures
    restart: RestartFigures
    stages: dict[str, float] = field(default_factory=dict)  # ms per batch (stage_profile)


def _health_serving(target: str, timeout: float = 10.0) -> bool:
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    with grpc.insecure_channel(target) as channel:
        reply = health_pb2_grpc.HealthStub(channel).Check(
            health_pb2.HealthCheckRequest(), timeout=timeout
        )
    return bool(reply.status == health_pb2.HealthCheckResponse.SERVING)


def _label_until_refit(client: Client, data: SyntheticPool, count: int = 20) -> int:
    """Label ``count`` drawn items with their true classes; wait for the refit they cause."""
    got = client.acquire(POOL_ID, count=count, labeler=LABELER)
    client.submit_labels(
        POOL_ID,
        {a.assignment_id: int(data.labels[data.row_of(a.item_id)]) for a in got},
        labeler=LABELER,
    )
    deadline = time.monotonic() + 900
    while time.monotonic() < deadline:
        version = int(client.get_pool(POOL_ID).surrogate_version)
        if version >= 1:
            return version
        time.sleep(0.1)
    raise RuntimeError("no refit within 900 s of the labels")


def measure(
    n: int, workdir: Path, *, say: Callable[[str], None] = print, profile_rows: int = 0
) -> SizeFigures:
    """Ingest ``n`` items through a real server and two bare databases, then restart."""
    data = make_pool_data(n, feature_dim=FEATURE_DIM, num_classes=NUM_CLASSES, seed=SEED)
    segments = data.segments
    workdir.mkdir(parents=True, exist_ok=True)
    chunks = _BareChunks(workdir / "bare-chunks.db")
    per_row = _BareRows(workdir / "bare-rows.db")
    server = ServerProcess(
        workdir / "server",
        extra_args=["--refit-interval-seconds", "1000000"],
        startup_timeout=900.0,  # a restart of a large pool rescores every item first
    )
    leadline: list[float] = []
    bare_chunks: list[float] = []
    bare_rows: list[float] = []
    try:
        with (
            server,
            Client(
                server.target,
                token=server.token,
                timeout=600.0,
                max_batch_rows=BATCH_ROWS,
                max_batch_bytes=16 << 20,
            ) as client,
        ):
            client.create_pool(
                POOL_ID,
                task="classification",
                feature_dim=FEATURE_DIM,
                num_classes=NUM_CLASSES,
                loss="zero-one",
                refit_every_labels=20,
            )
            handlers0 = server.handler_seconds().get("IngestItems", (0.0, 0))[0]
            cpu0 = server.cpu_seconds()
            for start in range(0, n, BATCH_ROWS):
                part = slice(start, min(n, start + BATCH_ROWS))
                now_ms = int(time.time() * 1000)
                for bare, samples in ((chunks, bare_chunks), (per_row, bare_rows)):
                    began = time.perf_counter()
                    bare.insert(data, part, now_ms)
                    samples.append(time.perf_counter() - began)
                began = time.perf_counter()
                result = client.ingest(
                    POOL_ID,
                    data.item_ids[part],
                    data.features[part],
                    data.outputs[part],
                    segments=segments[part],
                    event_time_ms=data.event_time_ms[part],
                )
                leadline.append(time.perf_counter() - began)
                if result.accepted != part.stop - part.start or result.messages != 1:
                    raise RuntimeError(f"ingest of rows {part}: {result}")
            ingest = IngestFigures(
                items=n,
                leadline=leadline,
                bare_chunks=bare_chunks,
                bare_rows=bare_rows,
                handler_seconds=server.handler_seconds().get("IngestItems", (0.0, 0))[0]
                - handlers0,
                server_cpu_seconds=server.cpu_seconds() - cpu0,
            )
            say(
                f"  {n:,} items: ingest {ingest.rate(leadline):,.0f} rows/s, bare same layout "
                f"{ingest.rate(bare_chunks):,.0f}, bare row per item {ingest.rate(bare_rows):,.0f}"
            )
            version = _label_until_refit(client, data)
        chunks.close()
        per_row.close()
        bare_read = min(
            bare_chunk_read(chunks.path, feature_dim=FEATURE_DIM, output_width=NUM_CLASSES)
            for _ in range(2)
        )
        bare_row_read = min(
            _bare_row_read(per_row.path, feature_dim=FEATURE_DIM, output_width=NUM_CLASSES)
            for _ in range(2)
        )
        offset = len(server.log())
        began = time.perf_counter()
        server.start()  # returns at the "listening on" line, printed once health is SERVING
        spawn_to_serving = time.perf_counter() - began
        if not _health_serving(server.target):
            raise RuntimeError("the restarted server does not report SERVING")
        log = server.log()[offset:]
        server.stop()
    finally:
        server.stop()
        for path in (chunks.path, per_row.path):
            for suffix in ("", "-wal", "-shm"):
                Path(f"{path}{suffix}").unlink(missing_ok=True)
    loaded = _LOADED.search(log)
    checked = _CHECKED.search(log)
    if loaded is None or checked is None or int(loaded.group(1)) != n:
        raise RuntimeError(f"restart log without the expected lines:\n{log[-3000:]}")
    restart = RestartFigures(
        items=n,
        spawn_to_serving=spawn_to_serving,
        pool_load=float(loaded.group(2)),
        scoring=float(loaded.group(3)),
        quick_check=float(checked.group(1)),
        bare_read=bare_read,
        bare_row_read=bare_row_read,
        surrogate_version=version,
    )
    say(
        f"  {n:,} items: restart {spawn_to_serving:.2f} s to SERVING, pool load "
        f"{restart.pool_load:.2f} s (scoring {restart.scoring:.2f} s), bare read "
        f"{bare_read:.2f} s"
    )
    stages = stage_profile(profile_rows, workdir / "profile") if profile_rows else {}
    return SizeFigures(ingest=ingest, restart=restart, stages=stages)


# ---------------------------------------------------------------------------------------
# where the time goes
# ---------------------------------------------------------------------------------------
def stage_profile(n: int, workdir: Path) -> dict[str, float]:
    """Milliseconds per 2,000-row batch of each ingest stage, in one process: the client's
    message building, serialising and parsing the message, the API's validation, scoring
    the batch (cold and current surrogate), the engine's work under the pool lock, and the
    wait for the durable commit. An in-process Engine over a real Database (no gRPC)."""
    from leadline.client._batching import IngestColumns, build_batches
    from leadline.service.api import validation
    from leadline.service.config import ServerConfig
    from leadline.service.engine import Engine, ingest
    from leadline.service.store import Database
    from leadline.v1 import leadline_pb2 as pb

    data = make_pool_data(n, feature_dim=FEATURE_DIM, num_classes=NUM_CLASSES, seed=SEED)
    segments = data.segments
    config = ServerConfig(data_dir=workdir / "data", insecure_no_auth=True)
    database = Database(config.data_dir)
    totals = dict.fromkeys(
        ("client: build message", "serialise + parse", "validate", "score", "apply", "commit"),
        0.0,
    )
    try:
        engine = Engine(database, config)
        settings = validation.pool_settings(
            "p",
            pb.Pool(task=1, num_classes=NUM_CLASSES, feature_dim=FEATURE_DIM, loss=1),
            defaults=config,
        )
        engine.create_pool(settings)
        pool = engine.pool("p")
        for start in range(0, n, BATCH_ROWS):
            part = slice(start, min(n, start + BATCH_ROWS))
            t0 = time.perf_counter()
            columns = IngestColumns.from_arrays(
                data.item_ids[part],
                data.features[part],
                data.outputs[part],
                segments=segments[part],
                event_time_ms=data.event_time_ms[part],
            )
            message = next(build_batches("pools/p", columns, max_rows=10**6, max_bytes=1 << 30))
            t1 = time.perf_counter()
            request = pb.ItemBatch.FromString(message.SerializeToString())
            t2 = time.perf_counter()
            batch = validation.item_batch(request, engine.settings("p"), max_items=10**6)
            t3 = time.perf_counter()
            surrogate = pool.data.surrogate
            current = surrogate.score(batch.features, batch.outputs)
            cold = pool.cold.score(batch.features, batch.outputs)
            t4 = time.perf_counter()
            with pool.lock:
                _, writes = ingest.apply_batch(
                    pool, batch, scored_with=surrogate, cold=cold, current=current
                )
            t5 = time.perf_counter()
            for write in writes:
                database.write(write)
            t6 = time.perf_counter()
            for key, seconds in zip(
                totals, (t1 - t0, t2 - t1, t3 - t2, t4 - t3, t5 - t4, t6 - t5), strict=True
            ):
                totals[key] += seconds
    finally:
        database.close()
    batches = -(-n // BATCH_ROWS)
    return {key: 1000.0 * seconds / batches for key, seconds in totals.items()}


# ---------------------------------------------------------------------------------------
# report
# ---------------------------------------------------------------------------------------
def _ms_per_batch(samples: Sequence[float]) -> str:
    values = np.asarray(samples) * 1000.0
    return f"{np.median(values):.1f} / {np.percentile(values, 95):.1f}"


def format_table(figures: Sequence[SizeFigures]) -> str:
    lines = [
        "| items | measurement | leadline | bare sqlite3, same layout (floor) | ratio | "
        "bare sqlite3, one row per item | ratio |",
        "|---:|---|---:|---:|---:|---:|---:|",
    ]
    for size in figures:
        ingest, restart = size.ingest, size.restart
        lead, chunk, row = (
            ingest.rate(ingest.leadline),
            ingest.rate(ingest.bare_chunks),
            ingest.rate(ingest.bare_rows),
        )
        lines.append(
            f"| {ingest.items:,} | ingest, {BATCH_ROWS:,}-row batches, rows/s | {lead:,.0f} | "
            f"{chunk:,.0f} | {lead / chunk:.2f}x | {row:,.0f} | {lead / row:.2f}x |"
        )
        lines.append(
            f"| {ingest.items:,} | ms per batch, median / p95 | "
            f"{_ms_per_batch(ingest.leadline)} | {_ms_per_batch(ingest.bare_chunks)} | | "
            f"{_ms_per_batch(ingest.bare_rows)} | |"
        )
        lines.append(
            f"| {ingest.items:,} | restart: pool load (server log), s | "
            f"{restart.pool_load:.2f} | {restart.bare_read:.2f} | "
            f"{restart.pool_load / restart.bare_read:.1f}x | {restart.bare_row_read:.2f} | "
            f"{restart.pool_load / restart.bare_row_read:.1f}x |"
        )
        lines.append(
            f"| {ingest.items:,} | restart: pool load without scoring, s | "
            f"{restart.pool_load - restart.scoring:.2f} | {restart.bare_read:.2f} | "
            f"{(restart.pool_load - restart.scoring) / restart.bare_read:.1f}x | "
            f"{restart.bare_row_read:.2f} | "
            f"{(restart.pool_load - restart.scoring) / restart.bare_row_read:.1f}x |"
        )
        lines.append(
            f"| {ingest.items:,} | restart: process spawn to health SERVING, s | "
            f"{restart.spawn_to_serving:.2f} | {restart.bare_read:.2f} | "
            f"{restart.spawn_to_serving / restart.bare_read:.1f}x | "
            f"{restart.bare_row_read:.2f} | "
            f"{restart.spawn_to_serving / restart.bare_row_read:.1f}x |"
        )
    return "\n".join(lines)


def _notes(figures: Sequence[SizeFigures]) -> list[str]:
    notes = []
    for size in figures:
        ingest, restart = size.ingest, size.restart
        wall = sum(ingest.leadline)
        notes.append(
            f"{ingest.items:,} items, ingest: client wall {wall:.1f} s, of which the server's "
            f"IngestItems handler {ingest.handler_seconds:.1f} s "
            f"({100 * ingest.handler_seconds / wall:.0f}%; the rest is the client building "
            f"messages and gRPC transport); server CPU {ingest.server_cpu_seconds:.1f} s."
        )
        notes.append(
            f"{ingest.items:,} items, restart (surrogate version {restart.surrogate_version}): "
            f"pool load {restart.pool_load:.2f} s = scoring every item with the cold start "
            f"and the latest surrogate {restart.scoring:.2f} s + reading and building "
            f"{restart.pool_load - restart.scoring:.2f} s; SQLite quick_check at open "
            f"{restart.quick_check:.2f} s; the rest of spawn-to-SERVING is the interpreter, "
            "imports, migrations and the gRPC server start."
        )
        if size.stages:
            total = sum(size.stages.values())
            parts = ", ".join(f"{k} {v:.2f}" for k, v in size.stages.items())
            notes.append(
                f"Stages of one in-process ingest (no gRPC; ms per {BATCH_ROWS:,}-row batch, "
                f"total {total:.1f}): {parts}."
            )
    return notes


def _targets(figures: Sequence[SizeFigures]) -> list[str]:
    """The issue's two targets at each size, met or missed and by how much."""
    lines = []
    for size in figures:
        ingest, restart = size.ingest, size.restart
        floor = ingest.rate(ingest.leadline) / ingest.rate(ingest.bare_chunks)
        rows = ingest.rate(ingest.leadline) / ingest.rate(ingest.bare_rows)
        lines.append(
            f"{ingest.items:,} items, ingest >= 0.8x the bare insert of the same rows: "
            f"{'met' if floor >= 0.8 else 'MISSED'} against the same-layout floor "
            f"({floor:.2f}x, {'' if floor >= 0.8 else f'{0.8 / floor:.1f}x short; '}"
            f"{rows:.2f}x the one-row-per-item insert)."
        )
        load = restart.pool_load / restart.bare_read
        bare = (restart.pool_load - restart.scoring) / restart.bare_read
        lines.append(
            f"{ingest.items:,} items, restart <= 2x the bare read of the same rows: "
            f"{'met' if load <= 2 else 'MISSED'} ({load:.1f}x for the pool load, "
            f"{restart.scoring / restart.pool_load:.0%} of it scoring every item with the "
            f"latest surrogate, which a bare read does not do; {bare:.1f}x without the "
            "scoring)."
        )
    return lines


def _environment() -> str:
    import grpc

    try:
        commit = subprocess.run(
            ["git", "-C", str(_ROOT), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    return (
        f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"SQLite {sqlite3.sqlite_version}, grpcio {grpc.__version__}; commit {commit}"
    )


def render_section(figures: Sequence[SizeFigures], *, command: str) -> str:
    date = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    lines = [
        "## Ingest and restart",
        "",
        f"- Command: `{command}`",
        f"- Date: {date}; {_environment()}; load average at the end "
        f"{' '.join(Path('/proc/loadavg').read_text().split()[:3])}",
        f"- Pool: the parcel pool of the system benchmark, {FEATURE_DIM} float32 features, "
        f"{NUM_CLASSES} classes, 4 segments, event times; {BATCH_ROWS:,}-row IngestItems "
        "calls through the real client, one at a time.",
        "",
        "Floor: a bare stdlib sqlite3 insert of the same rows in the same layout leadline "
        "uses (one `item_chunks` row per batch, one blob per column), WAL, "
        "`synchronous=FULL`, one durable commit per batch, batch by batch in turn with the "
        "server. For context, the same rows one row per item (the layout before schema 6, "
        "the first floor of this table). Restart floor: a bare read of the same rows into "
        "numpy arrays and an id list. Ratios: ingest leadline / floor rate (above 1 is "
        "faster); restart leadline / floor seconds (above 1 is slower).",
        "",
        format_table(figures),
        "",
        "Targets (issue 15, ratios of this run):",
        "",
    ]
    lines += [f"- {line}" for line in _targets(figures)]
    lines += [
        "",
        "Where the time goes: an ingest batch of the floor is one blob insert and one "
        "durable commit. leadline adds, per batch, the client building the message, gRPC "
        "transport, validation, scoring the batch, the in-memory append under the pool "
        "lock and the hand-off to the single writer thread (group commit in a savepoint); "
        "the stage profile below splits an in-process batch. A restart is dominated by "
        "scoring every item with the pool's latest surrogate (a LightGBM ensemble), the "
        "same work a refit's rescoring does; reading the chunks and building the pool is "
        "the rest.",
        "",
        "Details measured in the same run:",
        "",
    ]
    lines += [f"- {note}" for note in _notes(figures)]
    return "\n".join(lines) + "\n"


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument(
        "--sizes", default="100000,1000000", help="comma-separated pool sizes (items)"
    )
    parser.add_argument("--profile-rows", type=int, default=200_000, help="0 = no stage profile")
    parser.add_argument("--output", type=Path, default=None, help="markdown file to write")
    args = parser.parse_args(argv)
    sizes = [int(size) for size in args.sizes.split(",")]
    full = sizes == [100_000, 1_000_000]
    output = args.output or (_ROOT / "BENCHMARKS.md" if full else _ROOT / "bench-out" / "ingest.md")
    figures = []
    with tempfile.TemporaryDirectory(prefix="leadline-ingest-") as tmp:
        for i, n in enumerate(sizes):
            profile = min(n, args.profile_rows) if i == 0 else 0
            figures.append(measure(n, Path(tmp) / f"n{n}", profile_rows=profile))
    print(format_table(figures))
    for note in _targets(figures) + _notes(figures):
        print(f"- {note}")
    shown = sys.argv[1:] if argv is None else list(argv)
    command = shlex.join([".venv/bin/python", "benchmarks/ingest.py", *shown])
    output.parent.mkdir(parents=True, exist_ok=True)
    if not output.exists():
        output.write_text("# Benchmarks\n", encoding="utf-8")
    replace_section(output, SECTION, render_section(figures, command=command))
    print(f"wrote the {SECTION} section of {output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
