"""Acceptance: two ingest clients, a labeler and a gate poller for 20 s; no errors, and the
counts add up exactly."""

from __future__ import annotations

import threading
import time
import uuid
from collections import Counter

import numpy as np

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Dataset, Harness, classification_pool, item_batch

_POOL = "pools/busy"
_SECONDS = 20.0
_BATCH = 250


def test_concurrent_ingest_labeling_and_gates_add_up(
    harness: Harness, digits_pool: Dataset
) -> None:
    data = digits_pool
    stop = threading.Event()
    errors: list[BaseException] = []
    tally: Counter[str] = Counter()
    tally_lock = threading.Lock()
    truth: dict[str, int] = {}
    truth_lock = threading.Lock()

    def record(**counts: int) -> None:
        with tally_lock:
            tally.update(counts)

    def guarded(body):  # type: ignore[no-untyped-def]
        def run() -> None:
            try:
                body()
            except BaseException as error:  # noqa: BLE001 - reported by the main thread
                errors.append(error)
                stop.set()

        return run

    def ingester(prefix: str, seed: int) -> None:
        rng = np.random.default_rng(seed)
        sent = 0
        with harness.stubs("ingest") as stubs:
            previous: pb.ItemBatch | None = None
            while not stop.is_set():
                rows = rng.integers(0, len(data.ids), size=_BATCH)
                batch = item_batch("busy", data, rows)
                ids = [f"{prefix}-{sent + i}" for i in range(_BATCH)]
                batch.ClearField("item_ids")
                batch.item_ids.extend(ids)
                batch.request_id = str(uuid.uuid4())
                with truth_lock:
                    truth.update(zip(ids, (int(data.labels[r]) for r in rows), strict=True))
                summary = stubs.call(stubs.ingest.IngestItems, batch)
                assert (summary.accepted, summary.duplicates, summary.rejected) == (_BATCH, 0, 0)
                # A retry with the same request id is answered from the first result ...
                retry = stubs.call(stubs.ingest.IngestItems, batch)
                assert retry.accepted == _BATCH
                assert retry.item_count == summary.item_count
                # ... and re-sending the previous batch under a new id counts duplicates only.
                if previous is not None:
                    previous.request_id = str(uuid.uuid4())
                    again = stubs.call(stubs.ingest.IngestItems, previous)
                    assert (again.accepted, again.duplicates) == (0, _BATCH)
                previous = batch
                sent += _BATCH
                record(accepted=_BATCH)

    def labeler() -> None:
        rounds = 0
        with harness.stubs("labeler") as stubs:
            while not stop.is_set():
                got = stubs.call(
                    stubs.labeling.AcquireItems,
                    pb.AcquireItemsRequest(pool=_POOL, count=5, labeler="vendor-a"),
                ).assignments
                if not got:
                    time.sleep(0.05)
                    continue
                rounds += 1
                submissions = []
                released = []
                for position, assignment in enumerate(got):
                    if position == 0 and rounds % 4 == 0:
                        submissions.append(
                            pb.LabelSubmission(
                                assignment_id=assignment.assignment_id, skip_reason="blurry"
                            )
                        )
                    elif position == 1 and rounds % 5 == 0:
                        released.append(assignment.assignment_id)
                    else:
                        with truth_lock:
                            label = truth[assignment.item_id]
                        submissions.append(
                            pb.LabelSubmission(
                                assignment_id=assignment.assignment_id, class_label=label
                            )
                        )
                reply = stubs.call(
                    stubs.labeling.SubmitLabels,
                    pb.SubmitLabelsRequest(pool=_POOL, labeler="vendor-a", labels=submissions),
                )
                assert reply.accepted == len(submissions)
                assert not reply.errors
                skipped = sum(s.WhichOneof("outcome") == "skip_reason" for s in submissions)
                record(labeled=len(submissions) - skipped, skipped=skipped)
                if released:
                    out = stubs.call(
                        stubs.labeling.ReleaseItems,
                        pb.ReleaseItemsRequest(
                            pool=_POOL, labeler="vendor-a", assignment_ids=released
                        ),
                    )
                    assert out.released == len(released)
                    record(released=len(released))

    def poller() -> None:
        with harness.stubs("reader") as stubs:
            while not stop.is_set():
                gate = stubs.call(
                    stubs.estimates.CheckGate, pb.CheckGateRequest(pool=_POOL, max_risk=0.5)
                )
                assert gate.verdict in (pb.VERDICT_PASS, pb.VERDICT_FAIL, pb.VERDICT_UNDECIDED)
                estimate = stubs.call(
                    stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL)
                )
                assert estimate.items_in_scope > 0
                record(polls=1)

    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("busy", data))
        stubs.call(stubs.ingest.IngestItems, _seed_batch(data, truth))
    threads = [
        threading.Thread(target=guarded(lambda: ingester("a", 1))),
        threading.Thread(target=guarded(lambda: ingester("b", 2))),
        threading.Thread(target=guarded(labeler)),
        threading.Thread(target=guarded(poller)),
    ]
    for thread in threads:
        thread.start()
    stop.wait(_SECONDS)
    stop.set()
    for thread in threads:
        thread.join(60)
    assert not errors, errors
    # Shown with `pytest -s`: throughput under this mixed load.
    print(f"mixed load for {_SECONDS:.0f} s: {dict(tally)}")
    with harness.stubs() as stubs:
        pool = stubs.call(stubs.pools.GetPool, pb.GetPoolRequest(name=_POOL))
        estimate = stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL))
    assert pool.item_count == tally["accepted"] + _SEED
    assert pool.labeled_count == tally["labeled"]
    assert pool.skipped_count == tally["skipped"]
    # Released draws wait to be re-offered; every other draw was labeled or skipped.
    assert pool.draw_count == pool.labeled_count + pool.skipped_count + pool.pending_count
    assert pool.pending_count <= tally["released"]
    assert estimate.labels_used == tally["labeled"]
    assert estimate.items_in_scope == pool.item_count
    assert tally["polls"] > 10
    assert tally["labeled"] > 50
    assert tally["accepted"] > 10 * _BATCH


_SEED = 200


def _seed_batch(data: Dataset, truth: dict[str, int]) -> pb.ItemBatch:
    rows = np.arange(_SEED)
    truth.update({data.ids[r]: int(data.labels[r]) for r in rows})
    return item_batch("busy", data, rows)
