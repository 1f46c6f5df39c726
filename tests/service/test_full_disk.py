"""A full disk, for real: the server's data directory on a 16 MiB tmpfs that the test fills.

Writes are refused while the disk is full (UNAVAILABLE, nothing kept, nothing half-kept),
the pool is rebuilt from the database once per failure episode (not once per failed
write), reads keep being answered, writes resume by themselves once space is back, and a
SIGTERM while the disk is full stops cleanly without losing anything acknowledged.
"""

from __future__ import annotations

import threading
import time
import urllib.request
from collections.abc import Callable
from pathlib import Path
from typing import Any

import grpc

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Stubs, classification_pool, item_batch
from tests.service.processes import ServerProcess, tokens_file
from tests.service.small_disk import small_filesystem

_POOL = "pools/digits"
_BATCH = 250


def _metric(server: ServerProcess, name: str) -> float:
    url = f"http://127.0.0.1:{server.metrics_port()}/metrics"
    with urllib.request.urlopen(url, timeout=30) as response:
        for line in response.read().decode().splitlines():
            if line.startswith(f"{name} "):
                return float(line.split()[1])
    raise AssertionError(f"no metric {name}")


def _reloads_logged(server: ServerProcess) -> int:
    return sum("; reloading" in line for line in server.log().splitlines())


def _unavailable(call: Callable[[], Any]) -> bool:
    """True if the call was refused with UNAVAILABLE ("not saved"); False if it went through."""
    refusal: grpc.RpcError | None = None
    try:
        call()
    except grpc.RpcError as error:
        refusal = error
    if refusal is None:
        return False
    assert refusal.code() == grpc.StatusCode.UNAVAILABLE, refusal.details()
    assert "not saved" in refusal.details()
    return True


def _snapshot(stubs: Stubs) -> tuple[bytes, list[bytes], bytes]:
    pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
    draws = stubs.call(stubs.estimates.ListDraws, pb.ListDrawsRequest(pool=_POOL))
    estimate = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
    return (
        pool.SerializeToString(deterministic=True),
        [d.SerializeToString(deterministic=True) for d in draws.draws],
        estimate.SerializeToString(deterministic=True),
    )


def test_full_disk_refuses_writes_reloads_once_recovers_and_stops_cleanly(
    tmp_path: Path, digits_pool: Dataset
) -> None:
    data = digits_pool
    tokens = tokens_file(tmp_path)
    with small_filesystem(tmp_path / "small", size_mib=16) as disk:
        data_dir = disk.mount_point / "data"
        command = (data_dir, tokens, "--metrics-listen", "127.0.0.1:0")
        server = ServerProcess(*command, prefix=disk.prefix, log_dir=tmp_path)
        try:
            port = server.wait_listening()
            channel = grpc.insecure_channel(f"127.0.0.1:{port}")
            stubs = Stubs(channel, "ops")
            stubs.call(stubs.pools.CreatePool, classification_pool("digits", data))
            acknowledged = 0
            for start in range(0, 1000, _BATCH):
                batch = item_batch("digits", data, range(start, start + _BATCH))
                acknowledged += stubs.call(stubs.ingest.IngestItems, batch).accepted
            held = stubs.call(
                stubs.labeling.AcquireItems,
                pb.AcquireItemsRequest(pool=_POOL, count=12, labeler="vendor"),
            ).assignments
            index = {item_id: i for i, item_id in enumerate(data.ids)}

            def label(assignment: pb.Assignment) -> pb.LabelSubmission:
                truth = int(data.labels[index[assignment.item_id]])
                return pb.LabelSubmission(assignment_id=assignment.assignment_id, class_label=truth)

            stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL, labeler="vendor", labels=[label(a) for a in held[:4]]
                ),
            )
            before = _snapshot(stubs)

            disk.fill()
            next_row = 1000

            def ingest_next() -> Any:
                nonlocal next_row
                start, next_row = next_row, next_row + _BATCH // 5
                batch = item_batch("digits", data, range(start, start + _BATCH // 5))
                return stubs.call(stubs.ingest.IngestItems, batch)

            # The first write that does not fit starts the episode.
            for _ in range(20):
                if _unavailable(ingest_next):
                    break
                acknowledged += _BATCH // 5
            else:
                raise AssertionError("the filled disk never refused a write")

            # Twenty more writes of every kind from four clients, reads in between.
            calls: list[Callable[[], Any]] = [
                ingest_next,
                lambda: stubs.call(
                    stubs.labeling.AcquireItems,
                    pb.AcquireItemsRequest(pool=_POOL, count=3, labeler="vendor"),
                ),
                lambda: stubs.call(
                    stubs.labeling.SubmitLabels,
                    pb.SubmitLabelsRequest(
                        pool=_POOL, labeler="vendor", labels=[label(a) for a in held[4:8]]
                    ),
                ),
                lambda: stubs.call(
                    stubs.labeling.ReleaseItems,
                    pb.ReleaseItemsRequest(
                        pool=_POOL, labeler="vendor", assignment_ids=[held[8].assignment_id]
                    ),
                ),
            ]
            refused: list[bool] = []
            lock = threading.Lock()

            def client(kind: int) -> None:
                for _ in range(5):
                    outcome = _unavailable(calls[kind])
                    with lock:
                        refused.append(outcome)
                    stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
                    time.sleep(0.3)  # the episode outlasts the first probes, which fail

            threads = [threading.Thread(target=client, args=(k,)) for k in range(4)]
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join(120)
            assert refused == [True] * 20
            # Before: one reload of the whole pool per failed write (21 here).
            assert _reloads_logged(server) == 1
            assert _metric(server, "leadline_pool_reloads_total") == 1
            assert _metric(server, "leadline_store_refusing_writes") == 1
            assert "probe write failed (database or disk is full)" in server.log()
            assert _snapshot(stubs) == before  # nothing of the refused writes is visible

            # Space comes back: writes resume without a restart (after the next probe).
            disk.free()
            deadline = time.monotonic() + 60
            while _unavailable(ingest_next):
                assert time.monotonic() < deadline, f"writes did not resume:\n{server.log()}"
                time.sleep(0.5)
            acknowledged += _BATCH // 5
            assert _metric(server, "leadline_store_refusing_writes") == 0
            reply = stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL, labeler="vendor", labels=[label(a) for a in held[4:8]]
                ),
            )
            assert reply.accepted == 4
            pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
            assert (pool.item_count, pool.labeled_count) == (acknowledged, 8)

            # Full again, then SIGTERM: the final WAL checkpoint cannot grow leadline.db.
            disk.fill()
            while not _unavailable(ingest_next):
                acknowledged += _BATCH // 5
            stopped = _snapshot(stubs)
            channel.close()
            assert server.terminate() == 0
            log = server.log()
            assert "Traceback" not in log, log
            assert "could not fold the write-ahead log" in log
        finally:
            server.kill()

        disk.free()
        again = ServerProcess(*command, prefix=disk.prefix, log_dir=tmp_path)
        try:
            port = again.wait_listening()
            with grpc.insecure_channel(f"127.0.0.1:{port}") as channel:
                stubs = Stubs(channel, "ops")
                assert _snapshot(stubs) == stopped
                pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
                assert (pool.item_count, pool.labeled_count) == (acknowledged, 8)
            assert again.terminate() == 0
        finally:
            again.kill()
