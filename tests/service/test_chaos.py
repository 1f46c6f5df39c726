"""kill -9 at random moments under a load of several clients, then exact bookkeeping.

A real ``leadline serve`` child takes a monitoring job (ingest), two labeling vendors
(acquire, submit, skip, release) and a release gate polling, all through the Python client,
each write with a request id kept across its own retries (what the client does after a
lost reply). The server is killed with SIGKILL four times at random moments and started
again on the same port and data directory. Afterwards every acknowledged item and label is
there exactly once, every draw was acknowledged to exactly one acquire, open leases are
back with their holders and probabilities, released draws are re-offered with theirs, and
a clean restart gives byte-identical answers.

The kill times come from a seeded generator; the seed is in the test's output (-s).
"""

from __future__ import annotations

import random
import threading
import time
import uuid
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import TypeVar

import grpc

from leadline.client import Client, LocalServer, Skip, Unavailable, Verdict
from leadline.v1 import leadline_pb2 as pb
from leadline.v1 import leadline_pb2_grpc as pb_grpc
from tests.service.helpers import Dataset

_T = TypeVar("_T")
_POOL = "chaos"
_TOKENS = {
    "chaos-admin-token": ["admin", "ingest", "reader"],
    "chaos-vendor-one": ["labeler"],
    "chaos-vendor-two": ["labeler"],
    "chaos-gate-token": ["reader"],
}
_KILLS = 4
_BATCH = 50
_FIRST_ITEMS = 500


@dataclass
class Ledger:
    """What the server acknowledged, as the clients saw it."""

    lock: threading.Lock = field(default_factory=threading.Lock)
    items: list[str] = field(default_factory=list)
    duplicates: int = 0
    # draw_index -> (item_id, probability); one entry per acknowledged acquisition.
    acquired: dict[int, list[tuple[str, str, float, str]]] = field(
        default_factory=lambda: defaultdict(list)
    )
    labeled: dict[int, int] = field(default_factory=dict)
    skipped: dict[int, str] = field(default_factory=dict)
    released: dict[int, int] = field(default_factory=lambda: defaultdict(int))
    gate_polls: int = 0
    # (start, end) of every call, to count those a kill interrupted.
    spans: list[tuple[float, float]] = field(default_factory=list)
    failures: list[BaseException] = field(default_factory=list)


def _until_done(ledger: Ledger, call: Callable[[], _T]) -> _T:
    """Repeat the very same call (same request id) until the server answers it."""
    started = time.monotonic()
    while True:
        try:
            answer = call()
        except Unavailable:
            if time.monotonic() > started + 120:
                raise
            time.sleep(0.05)
            continue
        with ledger.lock:
            ledger.spans.append((started, time.monotonic()))
        return answer


def _ingester(client: Client, data: Dataset, ledger: Ledger, stop: threading.Event) -> None:
    start = _FIRST_ITEMS
    while not stop.is_set() and start < len(data.ids):
        rows = slice(start, start + _BATCH)
        request_id = str(uuid.uuid4())
        result = _until_done(
            ledger,
            partial(
                client.ingest,
                _POOL,
                data.ids[rows],
                data.features[rows],
                data.outputs[rows],
                request_id=request_id,
            ),
        )
        with ledger.lock:
            ledger.items.extend(data.ids[rows][: result.accepted])
            ledger.duplicates += result.duplicates
        start += _BATCH
        time.sleep(0.02)


def _vendor(
    client: Client, name: str, data: Dataset, ledger: Ledger, stop: threading.Event, seed: int
) -> None:
    rng = random.Random(seed)
    index = {item_id: i for i, item_id in enumerate(data.ids)}
    while not stop.is_set():
        request_id = str(uuid.uuid4())
        batch = _until_done(
            ledger,
            partial(client.acquire, _POOL, 5, labeler=name, request_id=request_id),
        )
        with ledger.lock:
            for a in batch:
                ledger.acquired[a.draw_index].append(
                    (name, a.item_id, a.selection_probability, a.assignment_id)
                )
        answers: dict[str, int | Skip] = {}
        outcomes: dict[int, int | Skip] = {}
        to_release = []
        for a in batch:
            roll = rng.random()
            if roll < 0.2:
                to_release.append(a)
            elif roll < 0.3:
                answers[a.assignment_id] = outcomes[a.draw_index] = Skip(f"unclear {a.item_id}")
            else:
                label = int(data.labels[index[a.item_id]])
                answers[a.assignment_id] = outcomes[a.draw_index] = label
        if answers:
            submit_id = str(uuid.uuid4())
            reply = _until_done(
                ledger,
                partial(client.submit_labels, _POOL, answers, labeler=name, request_id=submit_id),
            )
            assert reply.accepted == len(answers), reply
            with ledger.lock:
                for draw_index, outcome in outcomes.items():
                    if isinstance(outcome, Skip):
                        ledger.skipped[draw_index] = outcome.reason
                    else:
                        ledger.labeled[draw_index] = outcome
        if to_release:
            release_id = str(uuid.uuid4())
            _until_done(
                ledger,
                partial(
                    client.release,
                    _POOL,
                    [a.assignment_id for a in to_release],
                    labeler=name,
                    request_id=release_id,
                ),
            )
            with ledger.lock:
                for a in to_release:
                    ledger.released[a.draw_index] += 1
        time.sleep(rng.uniform(0.0, 0.05))


def _gate(client: Client, ledger: Ledger, stop: threading.Event) -> None:
    while not stop.is_set():
        result = _until_done(
            ledger,
            lambda: client.check_gate(_POOL, max_risk=0.5, confidence=0.9),
        )
        assert result.verdict in (Verdict.PASS, Verdict.FAIL, Verdict.UNDECIDED)
        with ledger.lock:
            ledger.gate_polls += 1
        time.sleep(0.05)


def _guarded(ledger: Ledger, work: Callable[[], None]) -> Callable[[], None]:
    def run() -> None:
        try:
            work()
        except BaseException as error:  # reported by the main thread
            with ledger.lock:
                ledger.failures.append(error)

    return run


def _snapshot(client: Client, target: str) -> list[bytes]:
    """The pool, its draws, the estimate in each mode and a gate, as the bytes on the wire."""
    pool = client.get_pool(_POOL)
    answers = [pool.SerializeToString(deterministic=True)]
    answers += [d.SerializeToString(deterministic=True) for d in client.list_draws(_POOL)]
    metadata = (("authorization", "Bearer chaos-admin-token"),)
    with grpc.insecure_channel(target) as channel:
        estimates = pb_grpc.EstimateServiceStub(channel)
        for mode in (
            pb.ESTIMATOR_MODE_UNBIASED,
            pb.ESTIMATOR_MODE_SURROGATE,
            pb.ESTIMATOR_MODE_BALANCED,
        ):
            estimate = estimates.GetEstimate(
                pb.GetEstimateRequest(pool=f"pools/{_POOL}", mode=mode),
                metadata=metadata,
                timeout=60,
            )
            answers.append(estimate.SerializeToString(deterministic=True))
        gate = estimates.CheckGate(
            pb.CheckGateRequest(pool=f"pools/{_POOL}", max_risk=0.5, confidence=0.9),
            metadata=metadata,
            timeout=60,
        )
        answers.append(gate.SerializeToString(deterministic=True))
    return answers


def _quiet(client: Client) -> None:
    """Wait until background refits stop changing the surrogate (as tests/client do)."""
    deadline = time.monotonic() + 90
    version, since = client.get_pool(_POOL).surrogate_version, time.monotonic()
    while time.monotonic() - since < 2.0:
        assert time.monotonic() < deadline, "refits never settled"
        time.sleep(0.25)
        current = client.get_pool(_POOL).surrogate_version
        if current != version:
            version, since = current, time.monotonic()


def test_kill_9_under_load_loses_nothing_acknowledged(tmp_path: Path, digits_pool: Dataset) -> None:
    data = digits_pool
    seed = random.SystemRandom().randrange(2**32)
    print(f"chaos seed {seed}")
    rng = random.Random(seed)
    server = LocalServer(tmp_path, tokens=_TOKENS)
    server.start()
    admin = Client(server.target, token="chaos-admin-token", timeout=60)
    vendors = [
        Client(server.target, token="chaos-vendor-one", timeout=60),
        Client(server.target, token="chaos-vendor-two", timeout=60),
    ]
    gate = Client(server.target, token="chaos-gate-token", timeout=60)
    ledger = Ledger()
    try:
        admin.create_pool(
            _POOL, task="classification", num_classes=10, feature_dim=64, loss="zero-one"
        )
        first = admin.ingest(
            _POOL,
            data.ids[:_FIRST_ITEMS],
            data.features[:_FIRST_ITEMS],
            data.outputs[:_FIRST_ITEMS],
        )
        ledger.items.extend(data.ids[: first.accepted])
        stop = threading.Event()
        workers = [
            threading.Thread(target=_guarded(ledger, lambda: _ingester(admin, data, ledger, stop))),
            threading.Thread(target=_guarded(ledger, lambda: _gate(gate, ledger, stop))),
        ]
        for number, vendor in enumerate(vendors):
            name, vendor_seed = f"vendor-{number}", rng.randrange(2**32)
            workers.append(
                threading.Thread(
                    target=_guarded(
                        ledger,
                        lambda v=vendor, n=name, s=vendor_seed: _vendor(
                            v, n, data, ledger, stop, s
                        ),
                    )
                )
            )
        for worker in workers:
            worker.start()
        kills = []
        for _ in range(_KILLS):
            time.sleep(rng.uniform(0.8, 2.5))
            kills.append(time.monotonic())
            server.kill()
            time.sleep(rng.uniform(0.0, 0.3))
            server.start()  # same port, same data directory
        time.sleep(rng.uniform(0.5, 1.5))
        stop.set()
        for worker in workers:
            worker.join(180)
            assert not worker.is_alive(), "a client never got its last call answered"
        assert not ledger.failures, ledger.failures
        # The kills hit calls in flight: the client (gRPC's retries, then ours) sent them
        # again with the same request id and they were answered after a restart.
        interrupted = sum(any(a < k < b for k in kills) for a, b in ledger.spans)
        assert interrupted > 0
        assert ledger.gate_polls > 0

        # Items: every acknowledged one, once.
        pool = admin.get_pool(_POOL)
        assert ledger.duplicates == 0
        assert pool.item_count == len(ledger.items) == len(set(ledger.items))

        # Draws: each acknowledged to exactly the acquisitions we saw, never two items twice.
        draws = admin.list_draws(_POOL)
        assert [d.draw_index for d in draws] == sorted(ledger.acquired)
        assert len({d.item_id for d in draws}) == len(draws)
        held: dict[str, list[pb.Draw]] = defaultdict(list)
        waiting = []
        for draw in draws:
            seen = ledger.acquired[draw.draw_index]
            # Re-offers keep the draw's item and probability.
            assert {(item, p) for _, item, p, _ in seen} == {
                (draw.item_id, draw.selection_probability)
            }
            releases = ledger.released[draw.draw_index]
            assert len(seen) - releases in (0, 1), (draw, seen, releases)
            if draw.draw_index in ledger.labeled:
                assert draw.status == pb.DRAW_STATUS_LABELED
                assert draw.class_label == ledger.labeled[draw.draw_index]
            elif draw.draw_index in ledger.skipped:
                assert draw.status == pb.DRAW_STATUS_SKIPPED
                assert draw.skip_reason == ledger.skipped[draw.draw_index]
            elif len(seen) == releases:
                assert draw.status == pb.DRAW_STATUS_WAITING
                waiting.append(draw)
            else:
                assert draw.status == pb.DRAW_STATUS_ASSIGNED
                assert draw.labeler == seen[-1][0]
                held[seen[-1][0]].append(draw)
        assert pool.labeled_count == len(ledger.labeled)
        assert pool.skipped_count == len(ledger.skipped)
        print(
            f"chaos: {pool.item_count} items, {len(draws)} draws, {len(ledger.labeled)} "
            f"labels, {len(ledger.skipped)} skips, {sum(ledger.released.values())} releases, "
            f"{interrupted} calls interrupted by a kill, {ledger.gate_polls} gate polls"
        )

        # Open leases came back with their holders: each vendor can still label what it
        # held when the last kill came.
        index = {item_id: i for i, item_id in enumerate(data.ids)}
        for number, vendor in enumerate(vendors):
            mine = held.get(f"vendor-{number}", [])
            if mine:
                answers = {
                    ledger.acquired[d.draw_index][-1][3]: int(data.labels[index[d.item_id]])
                    for d in mine
                }
                reply = vendor.submit_labels(_POOL, answers, labeler=f"vendor-{number}")
                assert reply.accepted == len(mine)

        # Released draws are offered again first, with their probabilities.
        if waiting:
            with Client(server.target, token="chaos-vendor-one", timeout=60) as late:
                offered = late.acquire(_POOL, len(waiting), labeler="vendor-late")
                assert [(a.draw_index, a.selection_probability) for a in offered] == [
                    (d.draw_index, d.selection_probability) for d in waiting
                ]
                late.release(_POOL, [a.assignment_id for a in offered], labeler="vendor-late")

        # A clean restart gives byte-identical answers.
        _quiet(admin)
        before = _snapshot(admin, server.target)
        assert server.stop() == 0
        server.start()
        assert _snapshot(admin, server.target) == before
    finally:
        for client in (admin, gate, *vendors):
            client.close()
        code = server.stop()
        assert code in (0, None), server.log()[-3000:]
