"""Running sums over a pool's items, kept up to date as items, labels and refits arrive, so
a fresh estimate of the whole pool or of one segment needs no pass over the items.

What an estimate needs from the items (``scopes.build_scope_inputs``), and where it comes
from here:

* the plug-in's sums over the scope's unlabeled items (count, current g, E[(L - g)^2]):
  per (block of ``BLOCK`` rows, segment) cells; a scope's sum adds the cells of its
  segment (or all cells), O(blocks * segments) with no per-item work;
* the draws' ``late_*`` terms (in-scope items that arrived after each draw, and their
  label-free score g0): prefix sums of g0 in arrival order for the whole pool, and per
  segment its rows in arrival order with their own prefix sums, so a draw's late sum is
  one subtraction after a binary search (O(draws * log N));
* the scope's size and the items no draw has reached yet: the same arrival lists.

Exactness, and why not plain running totals: a total updated by adding and subtracting
would drift with rounding and depend on the order of events, so a pool reloaded from the
store (start-up, after a failed write) would estimate different last digits than before.
Every value here is instead a fixed function of the current state, whatever the history:

* a cell is the sum of its block's unlabeled rows of that segment, added in row order from
  0.0 (``numpy.bincount``, which adds its weights in index order); a change to a row
  recomputes its block's cells, O(BLOCK), and a refit recomputes every cell, O(N) once;
* prefix sums add in arrival order starting from the previous prefix (``numpy.cumsum`` is
  sequential), so a pool ingested in batches of any size has the same prefix bits;
* counts are integers.

The result equals the full pass over the items up to float rounding (the order of the
additions differs); ``tests/service/test_running_sums.py`` checks them against the full
computation (``DrawLedger.terms`` / ``DrawLedger.plug_in_sums``) after random sequences of
ingest, draws, labels, skips and refits. Event-time windows are not covered: such a scope
is cut by event time, not by arrival, so its inputs stay one pass over the items (see
``docs/operations.md``).
"""

from __future__ import annotations

import numpy as np

from leadline.service.engine.columns import Column

__all__ = ["BLOCK", "RunningSums", "ScopeSums"]

#: Rows per block of the plug-in cells: a label recomputes one block (a few microseconds),
#: a scope sum adds N / BLOCK cells per segment.
BLOCK = 4096


class ScopeSums:
    """The plug-in sums over one scope's unlabeled items."""

    __slots__ = ("count", "expected_loss", "second_moment")

    def __init__(self, count: int, expected_loss: float, second_moment: float) -> None:
        self.count = count
        self.expected_loss = expected_loss
        self.second_moment = second_moment


class RunningSums:
    """Sums over a pool's items by block and segment, and arrival-order prefix sums of g0
    (see the module docstring). Mutated under the pool lock, by the owner's calls:
    :meth:`add_items` after items are appended, :meth:`refresh_rows` after items change
    status, :meth:`rebuild` after every score is replaced (a refit)."""

    def __init__(self, *, labeled_status: int) -> None:
        self._labeled = labeled_status
        self._size = 0
        # Cells (block, segment) over the unlabeled rows.
        self._count = np.zeros((0, 0), dtype=np.int64)
        self._expected = np.zeros((0, 0), dtype=np.float64)
        self._second = np.zeros((0, 0), dtype=np.float64)
        # g0 prefix sums in arrival order: prefix[i] = g0[0] + ... + g0[i - 1].
        self._prefix = Column(np.float64)
        self._prefix.extend(np.zeros(1))
        # Per segment: its rows in arrival order and the prefix sums of their g0.
        self._segment_rows: list[Column] = []
        self._segment_prefix: list[Column] = []

    # -- updates ------------------------------------------------------------------------
    def add_items(
        self,
        *,
        g0: np.ndarray,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        status: np.ndarray,
        segment: np.ndarray,
        num_segments: int,
    ) -> None:
        """Rows ``self.size ..`` of the pool's columns (all passed whole) were appended."""
        start, stop = self._size, g0.shape[0]
        new_g0 = g0[start:stop]
        last = float(self._prefix.view[-1])
        self._prefix.extend(np.cumsum(np.concatenate([[last], new_g0]))[1:])
        codes = segment[start:stop]
        if codes.size:
            # Codes the pool has not named (a caller that skipped add_segments) still count.
            num_segments = max(num_segments, int(codes.max()) + 1)
        while len(self._segment_rows) < num_segments:
            self._segment_rows.append(Column(np.int64))
            rows_prefix = Column(np.float64)
            rows_prefix.extend(np.zeros(1))
            self._segment_prefix.append(rows_prefix)
        if stop > start:
            order = np.argsort(codes, kind="stable")
            sorted_codes = codes[order]
            bounds = np.flatnonzero(np.diff(sorted_codes)) + 1
            for part in np.split(order, bounds):
                code = int(codes[part[0]])
                self._segment_rows[code].extend(start + part)
                prefix = self._segment_prefix[code]
                last = float(prefix.view[-1])
                prefix.extend(np.cumsum(np.concatenate([[last], new_g0[part]]))[1:])
        self._size = stop
        self._grow(num_blocks=-(-stop // BLOCK), num_segments=num_segments)
        first_block = start // BLOCK
        self._refresh_blocks(
            range(first_block, self._count.shape[0]),
            expected_loss=expected_loss,
            second_moment=second_moment,
            status=status,
            segment=segment,
        )

    def refresh_rows(
        self,
        rows: np.ndarray,
        *,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        status: np.ndarray,
        segment: np.ndarray,
    ) -> None:
        """Rows ``rows`` changed status (labeled): recompute their blocks' cells."""
        blocks = np.unique(np.asarray(rows, dtype=np.int64) // BLOCK)
        self._refresh_blocks(
            blocks.tolist(),
            expected_loss=expected_loss,
            second_moment=second_moment,
            status=status,
            segment=segment,
        )

    def rebuild(
        self,
        *,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        status: np.ndarray,
        segment: np.ndarray,
        num_segments: int,
    ) -> None:
        """Every score was replaced (a refit): recompute every cell, O(N) once."""
        n = self._size
        num_blocks = -(-n // BLOCK)
        width = max(num_segments, self._count.shape[1])
        cell = (np.arange(n, dtype=np.int64) // BLOCK) * width + segment[:n]
        unlabeled = status[:n] != self._labeled
        size = num_blocks * width
        shape = (num_blocks, width)
        self._count = np.bincount(cell[unlabeled], minlength=size).reshape(shape)
        self._expected = _weighted_cells(cell, expected_loss[:n], unlabeled, size).reshape(shape)
        self._second = _weighted_cells(cell, second_moment[:n], unlabeled, size).reshape(shape)

    # -- reading ------------------------------------------------------------------------
    @property
    def size(self) -> int:
        """Items covered (the pool's item count)."""
        return self._size

    def unlabeled(self, segment: int = -1) -> ScopeSums:
        """The plug-in sums over the unlabeled items of ``segment`` (-1: the whole pool)."""
        if segment < 0:
            return ScopeSums(
                int(self._count.sum()),
                float(self._expected.sum()),
                float(self._second.sum()),
            )
        if segment >= self._count.shape[1]:
            return ScopeSums(0, 0.0, 0.0)
        return ScopeSums(
            int(self._count[:, segment].sum()),
            float(self._expected[:, segment].sum()),
            float(self._second[:, segment].sum()),
        )

    def segment_size(self, segment: int) -> int:
        """Items carrying ``segment``."""
        return 0 if segment >= len(self._segment_rows) else self._segment_rows[segment].size

    def late(self, marks: np.ndarray, segment: int = -1) -> tuple[np.ndarray, np.ndarray]:
        """(count, sum of g0) of the items of ``segment`` (-1: all) at rows >= each mark."""
        marks = np.asarray(marks, dtype=np.int64)
        if segment < 0:
            prefix = self._prefix.view
            count = (self._size - marks).astype(np.float64)
            # prefix is nondecreasing (g0 >= 0), so the difference is never negative and
            # exactly 0 where no item came later.
            return count, prefix[-1] - prefix[marks]
        if segment >= len(self._segment_rows):
            zeros = np.zeros(marks.shape[0])
            return zeros, zeros.copy()
        rows = self._segment_rows[segment].view
        prefix = self._segment_prefix[segment].view
        first = np.searchsorted(rows, marks, side="left")
        return (rows.shape[0] - first).astype(np.float64), prefix[-1] - prefix[first]

    def arrived_from(self, mark: int, segment: int = -1) -> int:
        """Items of ``segment`` (-1: all) at rows >= ``mark``."""
        if segment < 0:
            return self._size - mark
        if segment >= len(self._segment_rows):
            return 0
        rows = self._segment_rows[segment].view
        return int(rows.shape[0] - np.searchsorted(rows, mark, side="left"))

    # -- internals ----------------------------------------------------------------------
    def _grow(self, *, num_blocks: int, num_segments: int) -> None:
        rows, width = self._count.shape
        add_rows, add_width = max(0, num_blocks - rows), max(0, num_segments - width)
        if add_rows or add_width:
            pad = ((0, add_rows), (0, add_width))
            self._count = np.pad(self._count, pad)
            self._expected = np.pad(self._expected, pad)
            self._second = np.pad(self._second, pad)

    def _refresh_blocks(
        self,
        blocks: range | list[int],
        *,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        status: np.ndarray,
        segment: np.ndarray,
    ) -> None:
        width = self._count.shape[1]
        for block in blocks:
            part = slice(block * BLOCK, min(self._size, (block + 1) * BLOCK))
            codes = segment[part]
            unlabeled = status[part] != self._labeled
            self._count[block] = np.bincount(codes[unlabeled], minlength=width)
            self._expected[block] = _weighted_cells(codes, expected_loss[part], unlabeled, width)
            self._second[block] = _weighted_cells(codes, second_moment[part], unlabeled, width)


def _weighted_cells(
    cells: np.ndarray, values: np.ndarray, keep: np.ndarray, size: int
) -> np.ndarray:
    """Per cell, the sum of the kept values in row order from 0.0 (the same bits whether
    one block or every block is summed: ``bincount`` adds its weights in index order)."""
    return np.bincount(cells[keep], weights=values[keep], minlength=size)
