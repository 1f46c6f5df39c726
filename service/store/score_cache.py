"""A file of each pool's item scores under its latest surrogate, so a restart need not
rescore every item.

Scoring a million items with the surrogate's tree ensemble takes tens of seconds on two
cores, nearly all of a restart's time (BENCHMARKS.md, ingest and restart). The scores are
derived data: the surrogate saved in the database gives them again. So after each refit
the server writes them to ``<data dir>/scores/<pool>.bin`` — without fsync, replacing
the previous file by rename — and a restart takes them from there when the file was
written for exactly the surrogate the database holds (the SHA-256 of its saved bytes),
for the same pool, and its contents pass a CRC-32. Anything else (no file, another
surrogate, a torn or damaged file, a different layout) is ignored and the items are
rescored, as before. Items ingested after the refit are not in the file; they are scored
at load as before.

Layout: 8 bytes ``LLSCORE1``, a 4-byte little-endian header length, the header (JSON:
pool id, model digest, rows, column names and dtypes, CRC-32 of the body), then each
column's raw bytes in header order.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["CachedScores", "drop_scores", "load_scores", "model_digest", "save_scores"]

_LOG = logging.getLogger(__name__)

_MAGIC = b"LLSCORE1"
_DIRECTORY = "scores"
_COLUMNS = ("expected_loss", "second_moment", "spread", "worst_deviation")


@dataclass(frozen=True)
class CachedScores:
    """The first ``rows`` items' scores under one surrogate (each array (rows,))."""

    expected_loss: np.ndarray
    second_moment: np.ndarray
    spread: np.ndarray
    worst_deviation: np.ndarray

    @property
    def rows(self) -> int:
        return int(self.expected_loss.shape[0])


def model_digest(blob: bytes) -> str:
    """What names a surrogate's scores: the SHA-256 of its saved bytes."""
    return hashlib.sha256(blob).hexdigest()


def _path(data_dir: Path, pool_id: str) -> Path:
    # Pool ids are checked names, but a digest keeps any of them a plain file name.
    name = hashlib.sha256(pool_id.encode("utf-8")).hexdigest()[:32]
    return data_dir / _DIRECTORY / f"{name}.bin"


def save_scores(data_dir: Path, pool_id: str, digest: str, scores: CachedScores) -> None:
    """Write the scores (derived data: no fsync; a crash leaves the old file, none, or a
    file the CRC-32 refuses). Errors are logged, never raised: the cache is optional."""
    path = _path(data_dir, pool_id)
    temporary = path.with_suffix(".tmp")
    try:
        path.parent.mkdir(mode=0o700, exist_ok=True)
        arrays = [np.ascontiguousarray(getattr(scores, name)) for name in _COLUMNS]
        crc = 0
        for array in arrays:
            crc = zlib.crc32(array.data, crc)
        header = json.dumps(
            {
                "pool_id": pool_id,
                "model_sha256": digest,
                "rows": scores.rows,
                "columns": [[name, a.dtype.str] for name, a in zip(_COLUMNS, arrays, strict=True)],
                "crc32": crc,
            },
            sort_keys=True,
        ).encode("utf-8")
        descriptor = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(descriptor, "wb") as file:
            file.write(_MAGIC + struct.pack("<I", len(header)) + header)
            for array in arrays:
                file.write(array.data)
        os.replace(temporary, path)
    except OSError as error:
        _LOG.warning("pool %s: score file not written (%s); a restart will rescore", pool_id, error)
        temporary.unlink(missing_ok=True)


def load_scores(data_dir: Path, pool_id: str, digest: str) -> CachedScores | None:
    """The pool's saved scores if they belong to the surrogate ``digest`` names and are
    intact; None otherwise (the reason is logged)."""
    path = _path(data_dir, pool_id)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as error:
        _LOG.warning("pool %s: score file unreadable (%s); rescoring", pool_id, error)
        return None
    reason = "unknown layout"
    try:
        if data[:8] == _MAGIC:
            (length,) = struct.unpack("<I", data[8:12])
            header = json.loads(data[12 : 12 + length])
            body = memoryview(data)[12 + length :]
            rows = int(header["rows"])
            dtypes = [np.dtype(str(dtype)) for _, dtype in header["columns"]]
            names = [str(name) for name, _ in header["columns"]]
            if header["pool_id"] != pool_id:
                reason = "written for another pool"
            elif header["model_sha256"] != digest:
                reason = "written for another surrogate version"
            elif names != list(_COLUMNS) or len(body) != rows * sum(d.itemsize for d in dtypes):
                reason = "size or columns do not match its header"
            elif zlib.crc32(body) != int(header["crc32"]):
                reason = "CRC-32 mismatch (damaged or torn)"
            else:
                arrays: dict[str, np.ndarray] = {}
                offset = 0
                for name, dtype in zip(names, dtypes, strict=True):
                    arrays[name] = np.frombuffer(body, dtype=dtype, count=rows, offset=offset)
                    offset += rows * dtype.itemsize
                return CachedScores(**arrays)
    except (ValueError, KeyError, TypeError, struct.error) as error:
        reason = f"unreadable header ({error})"
    _LOG.info("pool %s: score file not used (%s); rescoring", pool_id, reason)
    return None


def drop_scores(data_dir: Path, pool_id: str) -> None:
    """Remove the pool's score file (the pool was deleted)."""
    try:
        _path(data_dir, pool_id).unlink(missing_ok=True)
    except OSError as error:
        _LOG.warning("pool %s: score file not removed (%s)", pool_id, error)
