"""A pool's item ids: the id of each row and the row of each id, in about 50 bytes per item.

A Python list of ids plus a ``dict`` from id to row costs about 150 bytes per item (a str
object, a list slot, a dict entry and an int object each); at a million items that is
more than the item's features. :class:`ItemIds` keeps the ids' UTF-8 text in one growing
buffer with the end offset of each, and finds rows by id through an open-addressing hash
table in two numpy arrays (the id's 64-bit ``hash`` and its row, linear probing, at most
half full). A hash match is confirmed by comparing the stored text, so two ids with the
same hash are told apart. Python's string hash is salted per process; the table lives only
in memory and is rebuilt with the pool.

Not thread-safe: the owner mutates and reads it under the pool lock.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np

from leadline.service.engine.columns import Column

__all__ = ["ItemIds"]

_START_SLOTS = 1024
_EMPTY = -1


def _hashes(ids: Sequence[str]) -> np.ndarray:
    return np.fromiter((hash(item_id) for item_id in ids), dtype=np.int64, count=len(ids))


class ItemIds:
    """Item ids by row (``ids[row]``) and rows by id (:meth:`get`, :meth:`rows_of`)."""

    def __init__(self) -> None:
        self._text = bytearray()
        self._ends = Column(np.int64)
        self._keys = np.zeros(_START_SLOTS, dtype=np.int64)
        self._rows = np.full(_START_SLOTS, _EMPTY, dtype=np.int32)  # < 2**31 items

    def __len__(self) -> int:
        return len(self._ends)

    def __getitem__(self, row: int) -> str:
        ends = self._ends.view
        start = int(ends[row - 1]) if row > 0 else 0
        return self._text[start : int(ends[row])].decode("utf-8")

    def __iter__(self) -> Iterator[str]:
        return (self[row] for row in range(len(self)))

    def get(self, item_id: str) -> int | None:
        """The row of ``item_id``, or None."""
        row = int(self.rows_of([item_id])[0])
        return None if row < 0 else row

    def rows_of(self, ids: Sequence[str]) -> np.ndarray:
        """The row of each id (int64), -1 where the pool has no such id."""
        keys = _hashes(ids)
        found = np.full(len(ids), _EMPTY, dtype=np.int64)
        mask = self._rows.shape[0] - 1
        pending = np.arange(len(ids))
        slots = keys & mask
        while pending.size:
            rows = self._rows[slots]
            hit = (rows != _EMPTY) & (self._keys[slots] == keys[pending])
            confirmed = np.zeros(pending.shape[0], dtype=bool)
            for j in np.flatnonzero(hit).tolist():
                # Same 64-bit hash: the same id unless the texts differ (then probe on).
                if self[int(rows[j])] == ids[int(pending[j])]:
                    confirmed[j] = True
            found[pending[confirmed]] = rows[confirmed]
            going = (rows != _EMPTY) & ~confirmed
            pending = pending[going]
            slots = (slots[going] + 1) & mask
        return found

    def extend(self, ids: Sequence[str]) -> None:
        """Append ``ids`` as the next rows; they must be new and distinct (the caller
        checked with :meth:`rows_of`)."""
        if not ids:
            return
        start = len(self)
        encoded = [item_id.encode("utf-8") for item_id in ids]
        lengths = np.fromiter(map(len, encoded), dtype=np.int64, count=len(encoded))
        base = len(self._text)
        self._text += b"".join(encoded)
        self._ends.extend(base + np.cumsum(lengths))
        needed = 2 * len(self)
        if needed > self._rows.shape[0]:
            self._grow(needed)
        self._insert(_hashes(ids), np.arange(start, start + len(ids), dtype=np.int32))

    def _grow(self, needed: int) -> None:
        size = self._rows.shape[0]
        while size < needed:
            size *= 2
        occupied = self._rows != _EMPTY
        keys, rows = self._keys[occupied], self._rows[occupied]
        self._keys = np.zeros(size, dtype=np.int64)
        self._rows = np.full(size, _EMPTY, dtype=np.int32)
        self._insert(keys, rows)

    def _insert(self, keys: np.ndarray, rows: np.ndarray) -> None:
        """Place each (key, row) in the first free slot from ``key & mask`` on; several
        pending entries that reach the same free slot take it in turn."""
        mask = self._rows.shape[0] - 1
        pending = np.arange(keys.shape[0])
        slots = keys & mask
        while pending.size:
            free = self._rows[slots] == _EMPTY
            candidates, candidate_slots = pending[free], slots[free]
            taken, first = np.unique(candidate_slots, return_index=True)
            winners = candidates[first]
            self._keys[taken] = keys[winners]
            self._rows[taken] = rows[winners]
            placed = np.zeros(keys.shape[0], dtype=bool)
            placed[winners] = True
            going = ~placed[pending]
            pending = pending[going]
            slots = (slots[going] + (~free[going]).astype(np.int64)) & mask
