"""The data directory: one server at a time, lost or damaged databases refused, private files.

Every case runs `leadline serve` as a child process against real files, as an operator
would, and reads its exit code and stderr (exit 3: the data directory cannot be served).
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
import stat
import subprocess
import sys
from collections.abc import Callable, Iterator
from pathlib import Path

import grpc
import pytest

from leadline.service.config import ServerConfig
from leadline.service.server import start_server
from leadline.service.store import DATABASE_FILE, DataDirectoryError
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Stubs, classification_pool, item_batch, label_round
from tests.service.processes import ServerProcess, tokens_file

_POOL = "pools/tumours"


@contextlib.contextmanager
def _running(data_dir: Path, tokens: Path) -> Iterator[tuple[ServerProcess, Stubs]]:
    server = ServerProcess(data_dir, tokens)
    try:
        port = server.wait_listening()
        with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
            yield server, Stubs(channel, "ops")
    finally:
        if server.process.poll() is None:
            server.kill()


def _fill(stubs: Stubs, data: Dataset) -> tuple[int, int]:
    stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
    stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(300)))
    labeled = label_round(stubs, "tumours", data, 6)
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    return pool.item_count, labeled


def _refused(data_dir: Path, tokens: Path) -> str:
    """Start a server that must refuse: exit code 3 within 60 s; returns its stderr."""
    server = ServerProcess(data_dir, tokens)
    code = server.wait_exit(60)
    if code is None:
        server.kill()
        raise AssertionError(f"the server started instead of refusing:\n{server.log()}")
    assert code == 3, server.log()
    log = server.log()
    assert "Traceback" not in log, log
    return log


def test_a_second_server_on_the_same_directory_exits_3_naming_the_holder(
    tmp_path: Path, cancer_pool: Dataset
) -> None:
    tokens = tokens_file(tmp_path)
    data_dir = tmp_path / "data"
    with _running(data_dir, tokens) as (first, stubs):
        acknowledged = _fill(stubs, cancer_pool)
        log = _refused(data_dir, tokens)
        assert f"data_dir = {str(data_dir)!r}" in log
        assert f"pid {first.pid}" in log
        assert "One server per data directory" in log
        # A kill -9 leaves no lock behind: the kernel drops it with the process.
        first.kill()
    with _running(data_dir, tokens) as (_, stubs):
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.item_count, pool.labeled_count) == acknowledged


def test_a_second_server_in_the_same_process_is_refused_too(tmp_path: Path) -> None:
    config = ServerConfig(data_dir=tmp_path / "d", listen="127.0.0.1:0", insecure_no_auth=True)
    running = start_server(config)
    try:
        with pytest.raises(DataDirectoryError, match=f"pid {os.getpid()}"):
            start_server(config)
    finally:
        running.stop()
    start_server(config).stop()  # stopping released the lock


def _empty(data_dir: Path) -> None:
    os.truncate(data_dir / DATABASE_FILE, 0)


def _missing(data_dir: Path) -> None:
    (data_dir / DATABASE_FILE).unlink()


def _half(data_dir: Path) -> None:
    path = data_dir / DATABASE_FILE
    os.truncate(path, path.stat().st_size // 2)


def _header(data_dir: Path) -> None:
    with (data_dir / DATABASE_FILE).open("r+b") as handle:
        handle.write(bytes(range(100)))


def _unread_table(data_dir: Path) -> None:
    """16 bytes over the first page of a table start-up never reads (server_requests):
    only SQLite's own check can notice."""
    path = data_dir / DATABASE_FILE
    with contextlib.closing(sqlite3.connect(path)) as connection:
        (root,) = connection.execute(
            "SELECT rootpage FROM sqlite_master WHERE name = 'server_requests'"
        ).fetchone()
        (page_size,) = connection.execute("PRAGMA page_size").fetchone()
    with path.open("r+b") as handle:
        handle.seek((root - 1) * page_size)
        handle.write(bytes(range(200, 216)))


def _rows_gap(data_dir: Path) -> None:
    """Sound to SQLite, unsound to leadline: 100 item rows missing before the last stored
    chunk of items (what two servers on one directory once left behind)."""
    with contextlib.closing(sqlite3.connect(data_dir / DATABASE_FILE)) as connection:
        connection.execute(
            "UPDATE item_chunks SET start_row = start_row + 100"
            " WHERE start_row = (SELECT MAX(start_row) FROM item_chunks)"
        )
        connection.commit()


def _empty_beside_a_log(data_dir: Path) -> None:
    (data_dir / "leadline.marker").unlink()
    _empty(data_dir)


@pytest.mark.parametrize(
    ("damage", "crash", "said"),
    [
        (_empty, False, "is empty (0 bytes), but leadline.marker says a database was created"),
        (_missing, False, "is missing, but leadline.marker says"),
        (_half, False, "database disk image is malformed"),
        (_header, False, "SQLite cannot open the database"),
        (_unread_table, False, "damaged; SQLite's quick_check reports"),
        (_empty_beside_a_log, True, "bytes of logged writes"),
        (_rows_gap, False, "the stored pools do not load (pool 'tumours': item rows are not"),
    ],
    ids=[
        "empty",
        "missing",
        "truncated",
        "header",
        "unread-table",
        "empty-beside-wal",
        "rows-gap",
    ],
)
def test_a_lost_or_damaged_database_is_refused_with_its_path_and_the_next_step(
    tmp_path: Path,
    cancer_pool: Dataset,
    damage: Callable[[Path], None],
    crash: bool,
    said: str,
) -> None:
    tokens = tokens_file(tmp_path)
    data_dir = tmp_path / "data"
    with _running(data_dir, tokens) as (server, stubs):
        _fill(stubs, cancer_pool)
        if crash:
            server.kill()  # the write-ahead log keeps the writes
        else:
            assert server.terminate() == 0  # the log is folded into leadline.db
    damage(data_dir)
    log = _refused(data_dir, tokens)
    assert said in log, log
    assert str(data_dir / DATABASE_FILE) in log
    assert "restore" in log
    assert "latest backup" in log
    assert f"leadline check --data-dir {data_dir}" in log


def test_a_new_directory_starts_empty_with_private_files(tmp_path: Path) -> None:
    """Under umask 022 the server still creates the directory 0700 and its files 0600."""
    tokens = tokens_file(tmp_path)
    data_dir = tmp_path / "fresh"
    previous = os.umask(0o022)
    try:
        with _running(data_dir, tokens) as (server, stubs):
            listed = stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
            assert list(listed.pools) == []
            names = sorted(path.name for path in data_dir.iterdir())
            modes = {name: stat.S_IMODE((data_dir / name).stat().st_mode) for name in names}
            assert server.terminate() == 0
    finally:
        os.umask(previous)
    assert stat.S_IMODE(data_dir.stat().st_mode) == 0o700
    assert names == [
        "leadline.db",
        "leadline.db-shm",
        "leadline.db-wal",
        "leadline.key",
        "leadline.lock",
        "leadline.marker",
    ]
    assert modes == dict.fromkeys(names, 0o600)


def test_a_directory_from_before_the_marker_starts_and_gains_one(
    tmp_path: Path, cancer_pool: Dataset
) -> None:
    tokens = tokens_file(tmp_path)
    data_dir = tmp_path / "data"
    with _running(data_dir, tokens) as (server, stubs):
        acknowledged = _fill(stubs, cancer_pool)
        assert server.terminate() == 0
    (data_dir / "leadline.marker").unlink()
    with _running(data_dir, tokens) as (server, stubs):
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        assert (pool.item_count, pool.labeled_count) == acknowledged
        assert server.terminate() == 0
    assert (data_dir / "leadline.marker").exists()


def _check(data_dir: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "leadline.client.cli", "check", "--data-dir", str(data_dir)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def test_check_command_runs_sqlites_integrity_check(tmp_path: Path, cancer_pool: Dataset) -> None:
    tokens = tokens_file(tmp_path)
    data_dir = tmp_path / "data"
    with _running(data_dir, tokens) as (server, stubs):
        _fill(stubs, cancer_pool)
        live = _check(data_dir)
        assert live.returncode == 0, live.stderr
        assert f"a server (pid {server.pid}) is using it" in live.stdout
        assert server.terminate() == 0
    sound = _check(data_dir)
    assert sound.returncode == 0, sound.stderr
    assert "integrity_check: ok" in sound.stdout
    _unread_table(data_dir)
    damaged = _check(data_dir)
    assert damaged.returncode == 3
    assert str(data_dir / DATABASE_FILE) in damaged.stdout + damaged.stderr
    assert "restore" in damaged.stdout + damaged.stderr
    missing = _check(tmp_path / "nowhere")
    assert missing.returncode == 3
    assert "no leadline database" in missing.stderr
