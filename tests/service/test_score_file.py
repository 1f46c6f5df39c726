"""The score file: a restart takes the last refit's item scores from it instead of
rescoring every item, and ignores it when it is not exactly that surrogate's, intact."""

from __future__ import annotations

import json
import struct
import zlib
from pathlib import Path

import numpy as np

from leadline.service.store import score_cache
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import (
    Dataset,
    Harness,
    Stubs,
    classification_pool,
    item_batch,
    label_round,
    wait_for_refits,
)

_POOL = "pools/wards"


def _estimates(stubs: Stubs) -> list[bytes]:
    replies = [
        stubs.call(stubs.estimates.GetEstimate, pb.GetEstimateRequest(pool=_POOL, mode=mode))
        for mode in (pb.ESTIMATOR_MODE_SURROGATE, pb.ESTIMATOR_MODE_BALANCED)
    ]
    return [r.SerializeToString(deterministic=True) for r in replies]


def _score_file(data_dir: Path) -> Path:
    files = sorted((data_dir / "scores").glob("*.bin"))
    assert len(files) == 1, files
    return files[0]


def _rewrite(path: Path, change: bytes | None = None, *, scale: float = 1.0) -> None:
    """Rewrite the file with its expected losses scaled (CRC kept right), or replace one
    body byte without fixing the CRC (``change``)."""
    data = bytearray(path.read_bytes())
    (length,) = struct.unpack("<I", data[8:12])
    header = json.loads(data[12 : 12 + length])
    body = bytearray(data[12 + length :])
    if change is not None:
        body[0] ^= change[0]
    else:
        rows = int(header["rows"])
        expected = np.frombuffer(bytes(body[: 8 * rows]), dtype="<f8") * scale
        body[: 8 * rows] = expected.tobytes()
        header["crc32"] = zlib.crc32(bytes(body))
    head = json.dumps(header, sort_keys=True).encode()
    path.write_bytes(bytes(data[:8]) + struct.pack("<I", len(head)) + head + bytes(body))


def test_a_restart_reads_the_score_file_and_ignores_a_damaged_one(
    harness_factory, cancer_pool: Dataset
) -> None:
    data = cancer_pool
    harness: Harness = harness_factory(refit_every_labels=10)
    first, later = range(0, 500), range(500, len(data.ids))
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("wards", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("wards", data, first))
        labeled = sum(label_round(stubs, "wards", data, 10) for _ in range(2))
        wait_for_refits(stubs, _POOL, labeled)
        # Items after the last refit are not in the file: the load scores them.
        stubs.call(stubs.ingest.IngestItems, item_batch("wards", data, later))
        before = _estimates(stubs)
    path = _score_file(harness.data_dir)
    original = path.read_bytes()

    # Intact: the restart's estimates are the same as before.
    harness.stop()
    harness.start()
    with harness.stubs() as stubs:
        assert _estimates(stubs) == before

    # The file is what the restart reads: scaled expected losses (with a right CRC) move
    # the surrogate-only estimate.
    harness.stop()
    _rewrite(path, scale=0.5)
    harness.start()
    with harness.stubs() as stubs:
        assert _estimates(stubs)[0] != before[0]

    # A damaged file (CRC no longer matches) is ignored: the items are rescored.
    harness.stop()
    path.write_bytes(original)
    _rewrite(path, change=b"\x01")
    harness.start()
    with harness.stubs() as stubs:
        assert _estimates(stubs) == before

    # Deleting the pool removes its file.
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.DeletePool, pb.DeletePoolRequest(name=_POOL))
    assert not path.exists()


def test_score_file_round_trip_and_refusals(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    scores = score_cache.CachedScores(
        expected_loss=rng.random(1000),
        second_moment=rng.random(1000).astype(np.float32),
        spread=rng.random(1000).astype(np.float32),
        worst_deviation=rng.random(1000).astype(np.float32),
    )
    digest = score_cache.model_digest(b"trees")
    score_cache.save_scores(tmp_path, "wards", digest, scores)
    back = score_cache.load_scores(tmp_path, "wards", digest)
    assert back is not None
    for name in ("expected_loss", "second_moment", "spread", "worst_deviation"):
        original = getattr(scores, name)
        assert getattr(back, name).dtype == original.dtype
        np.testing.assert_array_equal(getattr(back, name), original)
    # Another surrogate, another pool, a torn file, no file: None.
    assert score_cache.load_scores(tmp_path, "wards", score_cache.model_digest(b"x")) is None
    assert score_cache.load_scores(tmp_path, "beds", digest) is None
    (path,) = (tmp_path / "scores").glob("*.bin")
    path.write_bytes(path.read_bytes()[:-7])
    assert score_cache.load_scores(tmp_path, "wards", digest) is None
    path.write_bytes(b"not a score file")
    assert score_cache.load_scores(tmp_path, "wards", digest) is None
    path.unlink()
    assert score_cache.load_scores(tmp_path, "wards", digest) is None
    # Files only the owner can read, like the rest of the data directory.
    score_cache.save_scores(tmp_path, "wards", digest, scores)
    assert path.stat().st_mode & 0o777 == 0o600
    assert (tmp_path / "scores").stat().st_mode & 0o777 == 0o700
