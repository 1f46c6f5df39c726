"""Append-only numpy columns with amortised O(1) growth.

A pool's per-item arrays grow with every ingest batch; copying a million-row array per
batch would make ingest quadratic, so each column keeps spare capacity and grows it by a
quarter when full (amortised O(1) per row: each row is copied about four times in all).
Spare rows are allocated, never written: for a large column the pages stay unbacked
until rows fill them, so spare capacity costs address space, not resident memory.
:attr:`Column.view` is the filled part; a view taken earlier stays valid (it keeps the
old buffer alive) and its rows never change once written, except where the owner mutates
them in place under the pool lock.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["Column"]

_START = 64
_GROWTH = 4  # grow by capacity // _GROWTH (a quarter)


class Column:
    """A growable array of ``dtype`` whose rows have shape ``width``."""

    def __init__(self, dtype: Any, width: tuple[int, ...] = ()) -> None:
        self._data = np.empty((_START, *width), dtype=dtype)
        self.size = 0

    @property
    def view(self) -> np.ndarray:
        return self._data[: self.size]

    def __len__(self) -> int:
        return self.size

    def extend(self, values: np.ndarray) -> None:
        values = np.asarray(values, dtype=self._data.dtype)
        count = values.shape[0]
        needed = self.size + count
        if needed > self._data.shape[0]:
            capacity = max(needed, self._data.shape[0] + self._data.shape[0] // _GROWTH)
            grown = np.empty((capacity, *self._data.shape[1:]), dtype=self._data.dtype)
            grown[: self.size] = self._data[: self.size]
            self._data = grown
        self._data[self.size : needed] = values
        self.size = needed

    def adopt(self, array: np.ndarray, size: int) -> None:
        """Take ``array`` (same dtype and row shape, its first ``size`` rows filled) as
        the column's storage, without a copy; the rest is spare capacity."""
        if array.dtype != self._data.dtype or array.shape[1:] != self._data.shape[1:]:
            raise ValueError(
                f"array is {array.dtype} {array.shape[1:]}: the column holds "
                f"{self._data.dtype} {self._data.shape[1:]}."
            )
        if not 0 <= size <= array.shape[0]:
            raise ValueError(f"size = {size}: must be in [0, {array.shape[0]}].")
        self._data = array
        self.size = size
