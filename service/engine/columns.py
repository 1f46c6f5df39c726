"""Append-only numpy columns with amortised O(1) growth.

A pool's per-item arrays grow with every ingest batch; copying a million-row array per
batch would make ingest quadratic, so each column keeps spare capacity and doubles it when
full. :attr:`Column.view` is the filled part; a view taken earlier stays valid (it keeps the
old buffer alive) and its rows never change once written, except where the owner mutates
them in place under the pool lock.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["Column"]

_START = 64


class Column:
    """A growable array of ``dtype`` whose rows have shape ``width``."""

    def __init__(self, dtype: Any, width: tuple[int, ...] = (), *, fill: Any = 0) -> None:
        self._fill = fill
        self._data = np.full((_START, *width), fill, dtype=dtype)
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
            capacity = max(needed, 2 * self._data.shape[0])
            grown = np.full((capacity, *self._data.shape[1:]), self._fill, dtype=self._data.dtype)
            grown[: self.size] = self._data[: self.size]
            self._data = grown
        self._data[self.size : needed] = values
        self.size = needed

    def replace(self, values: np.ndarray) -> None:
        """Swap in a whole new content (same row shape), e.g. fresh scores after a refit."""
        values = np.asarray(values, dtype=self._data.dtype)
        capacity = max(_START, 2 * values.shape[0])
        data = np.full((capacity, *values.shape[1:]), self._fill, dtype=self._data.dtype)
        data[: values.shape[0]] = values
        self._data = data
        self.size = values.shape[0]
