"""A pool's draw weights kept in sum trees: k draws without replacement in O(k log N).

``draw_batch`` (selection.py) rebuilds the cumulative sum of the usefulness u over all
candidates for every batch: O(N) per call. :class:`DrawIndex` keeps the same weights in
two complete binary sum trees over the pool's rows (a node holds the sum of its two
children; leaves are rows; "sum tree", also "segment tree"):

* one over u (float64) for the u-proportional component of the defensive mixture
  q_m(j) = (1 - floor) u_j / U_m + floor / |U_m|, sampled by inverse CDF: descend from the
  root, going left while the target is below the left child's sum;
* one over presence (int64, 1 for a candidate) for the uniform component: the i-th
  remaining item in row order is found by the same descent on counts, exactly, with no
  rejection blow-up however few items remain.

Each node is recomputed as the sum of its two children on every update (never by adding
or subtracting a difference), so the trees hold exactly what a fresh build over the same
leaves would hold: no rounding drift however many items come and go, and the same
capacity (the power of two at or above the largest row) gives bit-identical trees whether
they were built at once or grew item by item. Building is O(N) once per refit; removing or
adding r items costs O(r log N); capacity doubles when a row beyond it arrives (amortised
O(1) per item; the existing levels are copied, not summed again).

**The draw.** :meth:`DrawIndex.draw` consumes the generator exactly like ``draw_batch``
over the same candidates in row order: per draw one ``rng.random() >= floor`` picks the
component (none when every remaining u is 0: uniform); the u-component draws
``target = rng.random() * total`` against the batch-start tree with "first prefix sum above
the target" (``searchsorted(..., side="right")``) semantics and rejects items drawn earlier
in the batch, and after ``_REJECTION_LIMIT`` rejections removes them from the tree and goes
on with the smaller total; the uniform component maps ``rng.integers(|U_0|)`` to the i-th
batch-start candidate and rejects drawn ones likewise. Rejection from the batch-start
distribution restricted to the remaining set samples exactly from the conditional
distribution, so the logged q_m(j) is the probability with which the draw was made. Given
the same candidates, u and seed it returns the same positions (as pool rows) as
``draw_batch``; the sums differ from ``draw_batch``'s sequential cumulative sum only by
rounding (pairwise instead of sequential order), about 1e-16 relative, which could flip a
pick only when a target falls within that distance of a boundary. Sum of u over U_m is
recomputed exactly (from the tree with the drawn leaves cleared) once subtraction would
have lost it to rounding, as in ``draw_batch``.

**Correction ranges.** ``draw_batch`` evaluates max_j up_j / q_m(j) over the batch-start
candidates exactly (O(N) per batch). Here the range is conservative and costs O(buckets)
per draw: at the build the items are put in at most ``RANGE_BUCKETS`` buckets by
v = u + c, c = floor U / ((1 - floor) N) at the build (q_m(j) is proportional to
u_j + c_m), with geometric edges in v so that within a bucket v varies by a factor of at
most (v_max / v_min)^(1 / RANGE_BUCKETS). Each bucket keeps the smallest u and the largest
up / down of every item it ever held (items added later join the bucket of their u and
lower its minimum if need be; items that leave are not taken out: a superset is valid).
Then for every item j in bucket b and every draw m,

    up_j / q_m(j) <= up_b / (A_m umin_b + b_m),   A_m = (1 - floor) / U_m, b_m = floor / |U_m|,

so max_b up_b / (A_m umin_b + b_m) contains every remaining item's correction until the
next build; it exceeds the exact range over the build-time set by at most the bucket's
factor in u + c_m (about 1% with 1024 buckets when u spans three orders of magnitude),
plus whatever the items that left contributed. ``min_probability`` is A_m min u + b_m over
every item the index held since the build (a lower bound on min_j q_m(j)).

The remaining sums of the expected loss h (whole set and per group code) are running
totals, updated by subtraction and addition and summed again from the rows once they fall
below 1e-4 of their last full sum (the same rounding care as U_m).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._checks import check_fraction, describe
from .selection import _REJECTION_LIMIT, DEFAULT_FLOOR, DrawBatch, _check_count, _draw_inputs

__all__ = ["RANGE_BUCKETS", "DrawIndex"]

#: Buckets of the conservative correction range (see the module docstring): the cost of a
#: draw's range is O(RANGE_BUCKETS); each bucket widens the range by its spread in u + c.
RANGE_BUCKETS: int = 1024

_MIN_CAPACITY = 1024
# Up to this many rows a tree update walks each row's ancestors one by one; beyond it,
# level by level with numpy.
_SCALAR_UPDATES = 64
# Resum a running total once it falls below this share of its last full sum (as in
# draw_batch: beyond it the accumulated rounding could reach 1e-10 of what is left).
_RESUM_SHARE = 1e-4


def _capacity_for(rows: int) -> int:
    """The smallest power of two >= max(rows, _MIN_CAPACITY)."""
    return max(_MIN_CAPACITY, 1 << max(int(rows) - 1, 0).bit_length())


class _SumTree:
    """A complete binary tree of sums over ``capacity`` leaves (heap layout: node i has
    children 2i and 2i + 1; leaf r sits at capacity + r). Each internal node is always
    left + right of its current children. Single nodes are read and written through a
    memoryview (several times faster than indexing the numpy array one scalar at a time)."""

    def __init__(self, leaves: np.ndarray, capacity: int) -> None:
        self.capacity = capacity
        self.nodes = np.zeros(2 * capacity, dtype=leaves.dtype)
        self.nodes[capacity : capacity + leaves.shape[0]] = leaves
        size = capacity // 2
        while size >= 1:
            self.nodes[size : 2 * size] = (
                self.nodes[2 * size : 4 * size : 2] + self.nodes[2 * size + 1 : 4 * size : 2]
            )
            size //= 2
        self._view = self.nodes.data

    @property
    def leaves(self) -> np.ndarray:
        """The leaves (a view: row r at index r)."""
        return self.nodes[self.capacity :]

    @property
    def total(self) -> float | int:
        return self._view[1]

    def set(self, rows: np.ndarray, values: np.ndarray | float | int) -> None:
        """Leaves ``rows`` take ``values``; their ancestors are summed again (O(r log N))."""
        if rows.shape[0] == 0:
            return
        self.nodes[self.capacity + rows] = values
        if rows.shape[0] <= _SCALAR_UPDATES:
            view = self._view
            for row in (self.capacity + rows).tolist():
                node = row >> 1
                while node:
                    view[node] = view[2 * node] + view[2 * node + 1]
                    node >>= 1
            return
        parents = np.unique((self.capacity + rows) >> 1)
        while True:
            self.nodes[parents] = self.nodes[2 * parents] + self.nodes[2 * parents + 1]
            if parents[0] == 1:
                return
            parents = np.unique(parents >> 1)

    def grow(self, capacity: int) -> None:
        """Room for ``capacity`` (a larger power of two) leaves: the old tree becomes the
        leftmost subtree at the same depth from the leaves; the new nodes above it hold the
        same sums (x + 0 = x), the rest are 0."""
        old, old_capacity = self.nodes, self.capacity
        nodes = np.zeros(2 * capacity, dtype=old.dtype)
        shift = (capacity // old_capacity).bit_length() - 1
        width = 1
        while width <= old_capacity:
            nodes[width << shift : (width << shift) + width] = old[width : 2 * width]
            width *= 2
        for level in range(shift - 1, -1, -1):
            nodes[1 << level] = nodes[1 << (level + 1)]
        self._view.release()
        self.nodes, self.capacity = nodes, capacity
        self._view = self.nodes.data

    def find(self, target: float | int) -> int:
        """The leaf whose prefix sum first exceeds ``target`` (``searchsorted`` 'right' on
        the cumulative sum): descend left while target < the left child's sum."""
        view = self._view
        node = 1
        capacity = self.capacity
        while node < capacity:
            node *= 2
            left = view[node]
            if target >= left:
                target -= left
                node += 1
        return node - capacity


@dataclass(frozen=True)
class _Buckets:
    """The range buckets: edges in v = u + offset, and per bucket the smallest u and the
    largest reach up / down of every item it held (empty buckets: count 0)."""

    offset: float
    v_low: float
    log_step: float  # log of the edges' ratio (0: one bucket)
    u_min: np.ndarray
    up: np.ndarray
    down: np.ndarray
    count: np.ndarray

    def of(self, u: np.ndarray) -> np.ndarray:
        """Bucket index of each u (clipped to the first / last bucket)."""
        size = self.u_min.shape[0]
        if self.log_step <= 0.0:
            return np.zeros(u.shape[0], dtype=np.int64)
        ratio = np.maximum((u + self.offset) / self.v_low, 1.0)
        index = np.floor(np.log(ratio) / self.log_step).astype(np.int64)
        return np.asarray(np.clip(index, 0, size - 1))

    def join(self, u: np.ndarray, up: np.ndarray, down: np.ndarray) -> None:
        """Items with (u, up, down) join their buckets."""
        if u.shape[0] == 0:
            return
        index = self.of(u)
        empty = self.count == 0
        self.u_min[empty] = np.inf
        np.minimum.at(self.u_min, index, u)
        np.maximum.at(self.up, index, up)
        np.maximum.at(self.down, index, down)
        np.add.at(self.count, index, 1)
        self.u_min[self.count == 0] = 0.0

    @classmethod
    def build(
        cls, u: np.ndarray, up: np.ndarray, down: np.ndarray, *, floor: float, buckets: int
    ) -> _Buckets:
        n = u.shape[0]
        total = float(u.sum())
        offset = floor * total / ((1.0 - floor) * n) if n and total > 0.0 and floor < 1.0 else 0.0
        v_low = v_high = 1.0
        log_step = 0.0
        if n and total > 0.0 and offset > 0.0:
            v_low, v_high = float(u.min()) + offset, float(u.max()) + offset
            if v_high > v_low:
                log_step = float(np.log(v_high / v_low)) / buckets
        size = buckets if log_step > 0.0 else 1
        made = cls(
            offset=offset,
            v_low=v_low,
            log_step=log_step,
            u_min=np.zeros(size),
            up=np.zeros(size),
            down=np.zeros(size),
            count=np.zeros(size, dtype=np.int64),
        )
        made.join(u, up, down)
        return made

    def ranges(
        self, scale_u: np.ndarray, scale_flat: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(high, low, min_probability) per draw for q_m = scale_u[m] u + scale_flat[m]."""
        held = self.count > 0
        u_min, up, down = self.u_min[held], self.up[held], self.down[held]
        if u_min.shape[0] == 0:
            zeros = np.zeros(scale_u.shape[0])
            return zeros, zeros.copy(), scale_flat.copy()
        q = scale_u[:, None] * u_min[None, :] + scale_flat[:, None]
        high = (up[None, :] / q).max(axis=1)
        low = -(down[None, :] / q).max(axis=1)
        return high, low, scale_u * float(u_min.min()) + scale_flat


class DrawIndex:
    """The draw weights of a pool's candidates by pool row (see the module docstring).

    Build with :meth:`build` (once per refit), then :meth:`draw` (the drawn rows leave),
    :meth:`add` (items arriving between refits, scored with the surrogate in force) and
    :meth:`remove` (items that left by other means). Not thread-safe: the owner serialises
    calls (the server's pool lock).
    """

    def __init__(self) -> None:
        # Use DrawIndex.build; the fields below are set there.
        self.loss_bound_ = 0.0
        # Per row: h (float64) and the group code (int32); u lives in the u tree's leaves
        # and presence in the presence tree's (no copies: about 36 bytes per row).
        self.expected_loss_ = np.zeros(0)
        self.groups_: np.ndarray | None = None
        self._weights = _SumTree(np.zeros(0), _MIN_CAPACITY)
        self._members = _SumTree(np.zeros(0, dtype=np.int32), _MIN_CAPACITY)
        self._buckets = _Buckets.build(
            np.zeros(0), np.zeros(0), np.zeros(0), floor=DEFAULT_FLOOR, buckets=1
        )
        self._loss_sum = 0.0
        self._loss_sum_reference = 0.0
        self._group_sums: np.ndarray | None = None

    # -- building and updates --------------------------------------------------------------
    @classmethod
    def build(
        cls,
        usefulness: np.ndarray,
        expected_loss: np.ndarray,
        *,
        loss_bound: float,
        present: np.ndarray | None = None,
        groups: np.ndarray | None = None,
        num_groups: int = 0,
        max_deviation: np.ndarray | None = None,
        floor: float = DEFAULT_FLOOR,
        buckets: int = RANGE_BUCKETS,
    ) -> DrawIndex:
        """The index over rows 0..n-1; ``present`` (bool, (n,), default all) marks the
        candidates. ``usefulness``, ``expected_loss`` (the control variate h the draws use,
        in [0, loss_bound]), ``groups`` / ``num_groups`` and ``max_deviation`` as in
        ``draw_batch``. ``floor`` only shapes the range buckets (each draw takes its own).
        O(n). Raises ValueError (field, value, rule) as ``draw_batch`` does, and on a
        ``present`` of another length or ``buckets`` < 1."""
        inputs = _draw_inputs(
            usefulness,
            expected_loss,
            loss_bound=loss_bound,
            max_deviation=max_deviation,
            groups=groups,
            num_groups=num_groups,
        )
        n = inputs.usefulness.shape[0]
        floor = check_fraction("floor", floor, low_open=True, high_open=False)
        if isinstance(buckets, bool) or int(buckets) != buckets or buckets < 1:
            raise ValueError(f"buckets = {describe(buckets)}: must be an integer >= 1.")
        if present is None:
            mask = np.ones(n, dtype=bool)
        else:
            mask = np.asarray(present, dtype=bool)
            if mask.shape != (n,):
                raise ValueError(f"present has shape {mask.shape}: must be ({n},).")
        index = cls()
        index.loss_bound_ = float(loss_bound)
        capacity = _capacity_for(n)
        index.expected_loss_ = np.zeros(capacity)
        index.expected_loss_[:n] = inputs.expected_loss
        index._weights = _SumTree(np.where(mask, inputs.usefulness, 0.0), capacity)
        index._members = _SumTree(mask.astype(np.int32), capacity)
        index._buckets = _Buckets.build(
            inputs.usefulness[mask],
            inputs.reach_up[mask],
            inputs.reach_down[mask],
            floor=floor,
            buckets=int(buckets),
        )
        if inputs.groups is not None:
            index.groups_ = np.zeros(capacity, dtype=np.int32)
            index.groups_[:n] = inputs.groups
        index._resum(num_groups=int(num_groups) if inputs.groups is not None else 0)
        return index

    @property
    def capacity(self) -> int:
        """Rows the index has room for (grows by doubling)."""
        return self._weights.capacity

    @property
    def present_(self) -> np.ndarray:
        """Whether each row 0..capacity-1 is a candidate (a fresh bool array, O(capacity))."""
        return np.asarray(self._members.leaves == 1)

    @property
    def usefulness_(self) -> np.ndarray:
        """u of each candidate row, 0 elsewhere (a view of the u tree's leaves)."""
        return self._weights.leaves

    @property
    def size(self) -> int:
        """Candidates now (|U|)."""
        return int(self._members.total)

    @property
    def num_groups(self) -> int:
        return 0 if self._group_sums is None else int(self._group_sums.shape[0])

    @property
    def usefulness_total(self) -> float:
        """Sum of u over the candidates."""
        return float(self._weights.total)

    @property
    def expected_loss_total(self) -> float:
        """Sum of h over the candidates (running total, >= 0)."""
        return max(self._loss_sum, 0.0)

    def add(
        self,
        rows: np.ndarray,
        usefulness: np.ndarray,
        expected_loss: np.ndarray,
        *,
        groups: np.ndarray | None = None,
        max_deviation: np.ndarray | None = None,
    ) -> None:
        """New candidates ``rows`` (distinct, not candidates now) with their u, h, group
        codes (required iff the index was built with groups; a new code widens the
        per-group sums) and reach. O(r log N), plus a doubling when a row is beyond the
        capacity. Raises ValueError on a row < 0, a repeated row or one present already."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.ndim != 1:
            raise ValueError(f"rows has shape {rows.shape}: must have 1 dimension(s).")
        if (groups is None) != (self.groups_ is None):
            raise ValueError(
                f"groups = {describe(groups)}: must be given exactly when the index was built "
                "with groups."
            )
        top = int(np.max(groups)) + 1 if groups is not None and len(groups) else 1
        inputs = _draw_inputs(
            usefulness,
            expected_loss,
            loss_bound=self.loss_bound_,
            max_deviation=max_deviation,
            groups=groups,
            num_groups=max(self.num_groups, top, 1),
        )
        if inputs.usefulness.shape[0] != rows.shape[0]:
            raise ValueError(
                f"usefulness has {inputs.usefulness.shape[0]} entries: must match rows "
                f"({rows.shape[0]})."
            )
        if rows.shape[0] == 0:
            return
        if rows.min() < 0:
            raise ValueError(f"rows min = {int(rows.min())}: must be >= 0.")
        if np.unique(rows).shape[0] != rows.shape[0]:
            raise ValueError("rows: must be distinct.")
        self._reserve(int(rows.max()) + 1)
        taken = self._members.leaves[rows] == 1
        if taken.any():
            raise ValueError(f"rows contains {int(rows[taken][0])}: already a candidate.")
        u, h = inputs.usefulness, inputs.expected_loss
        self.expected_loss_[rows] = h
        self._weights.set(rows, u)
        self._members.set(rows, 1)
        self._buckets.join(u, inputs.reach_up, inputs.reach_down)
        self._loss_sum += float(h.sum())
        self._loss_sum_reference = max(self._loss_sum_reference, self._loss_sum)
        if self.groups_ is not None and self._group_sums is not None:
            assert inputs.groups is not None
            self.groups_[rows] = inputs.groups
            if top > self._group_sums.shape[0]:
                self._group_sums = np.concatenate(
                    [self._group_sums, np.zeros(top - self._group_sums.shape[0])]
                )
            self._group_sums += np.bincount(
                inputs.groups, weights=h, minlength=self._group_sums.shape[0]
            )

    def remove(self, rows: np.ndarray) -> None:
        """Candidates ``rows`` leave (drawn elsewhere, withdrawn). O(r log N). Raises
        ValueError on a row that is not a candidate or a repeated row."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.ndim != 1:
            raise ValueError(f"rows has shape {rows.shape}: must have 1 dimension(s).")
        if rows.shape[0] == 0:
            return
        if np.unique(rows).shape[0] != rows.shape[0]:
            raise ValueError("rows: must be distinct.")
        bad = (rows < 0) | (rows >= self.capacity)
        if not bad.any():
            bad = self._members.leaves[rows] != 1
        if bad.any():
            raise ValueError(f"rows contains {int(rows[bad][0])}: not a candidate.")
        self._leave(rows)

    def _leave(self, rows: np.ndarray) -> None:
        self._weights.set(rows, 0.0)
        self._members.set(rows, 0)
        h = self.expected_loss_[rows]
        self._loss_sum -= float(h.sum())
        if self.groups_ is not None and self._group_sums is not None:
            self._group_sums -= np.bincount(
                self.groups_[rows], weights=h, minlength=self._group_sums.shape[0]
            )
        reference = self._loss_sum_reference
        if reference > 0.0 and self._loss_sum <= _RESUM_SHARE * reference:
            self._resum(num_groups=self.num_groups)

    def _reserve(self, rows: int) -> None:
        if rows <= self.capacity:
            return
        capacity = _capacity_for(rows)
        self._weights.grow(capacity)
        self._members.grow(capacity)

        def widen(array: np.ndarray) -> np.ndarray:
            wider = np.zeros(capacity, dtype=array.dtype)
            wider[: array.shape[0]] = array
            return wider

        self.expected_loss_ = widen(self.expected_loss_)
        if self.groups_ is not None:
            self.groups_ = widen(self.groups_)

    def _resum(self, *, num_groups: int) -> None:
        """The running sums of h, summed again over the candidates (O(capacity); at the
        build and when rounding could matter)."""
        h = np.where(self._members.leaves == 1, self.expected_loss_, 0.0)
        self._loss_sum = float(h.sum())
        self._loss_sum_reference = self._loss_sum
        if self.groups_ is not None:
            self._group_sums = np.bincount(self.groups_, weights=h, minlength=max(num_groups, 1))

    # -- drawing ---------------------------------------------------------------------------
    def draw(self, count: int, *, floor: float, rng: np.random.Generator) -> DrawBatch:
        """``count`` sequential draws without replacement from the candidates; the drawn
        rows leave the index. ``DrawBatch.positions`` are pool rows; every other field as
        ``draw_batch`` returns over the candidates in row order, except the correction
        ranges and ``min_probability``, which are the conservative ones of the module
        docstring. O(count log N + count * RANGE_BUCKETS). Raises ValueError on a floor
        outside (0, 1], count < 0 or count > the candidates, or a non-Generator rng."""
        floor = check_fraction("floor", floor, low_open=True, high_open=False)
        n = self.size
        count = _check_count(count, n)
        if not isinstance(rng, np.random.Generator):
            raise ValueError(f"rng = {describe(rng)}: must be a numpy.random.Generator.")
        weights = self._weights
        members = self._members.leaves
        u = weights.leaves  # u of the candidates (a drawn row keeps its leaf until cleared)
        drawn_u: dict[int, float] = {}
        positions = np.empty(count, dtype=np.int64)
        probabilities = np.empty(count)
        scale_u = np.zeros(count)
        scale_flat = np.empty(count)
        sampling_total = float(weights.total)  # the u-component's target scale
        total_u = sampling_total  # reference of the rounding check
        remaining_u = sampling_total
        drawn: list[int] = []
        taken: set[int] = set()
        cleared: set[int] = set()  # drawn rows already zeroed in the u tree (rejections)
        for m in range(count):
            n_m = n - m
            if total_u > 0.0 and remaining_u <= _RESUM_SHARE * total_u:
                remaining_u = self._usefulness_without(drawn_u, cleared)
                total_u = remaining_u
            if remaining_u > 0.0:
                scale_u[m] = (1.0 - floor) / remaining_u
                scale_flat[m] = floor / n_m
                use_score = rng.random() >= floor
            else:
                scale_flat[m] = 1.0 / n_m
                use_score = False
            tries = 0
            while True:
                if use_score:
                    pick = weights.find(rng.random() * sampling_total)
                    accept = members[pick] == 1 and u[pick] > 0.0
                else:
                    pick = self._members.find(int(rng.integers(n)))
                    accept = True
                if accept and pick not in taken:
                    break
                tries += 1
                if use_score and tries >= _REJECTION_LIMIT:
                    # Most of the score mass was drawn already: clear it from the tree.
                    fresh = [row for row in drawn if row not in cleared]
                    weights.set(np.array(fresh, dtype=np.int64), 0.0)
                    cleared.update(fresh)
                    sampling_total = float(weights.total)
                    tries = 0
            taken.add(pick)
            drawn.append(pick)
            positions[m] = pick
            weight = float(u[pick])
            drawn_u[pick] = weight
            # A probability is at most 1 (the last item's (1 - eps) + eps can round above).
            probabilities[m] = min(scale_u[m] * weight + scale_flat[m], 1.0)
            remaining_u -= weight

        drawn_h = self.expected_loss_[positions]
        before = np.concatenate([[0.0], np.cumsum(drawn_h)[:-1]]) if count else np.zeros(0)
        remaining_expected_loss = np.maximum(self._loss_sum - before, 0.0)
        by_group = None
        if self._group_sums is not None and self.groups_ is not None:
            step = np.zeros((count, self._group_sums.shape[0]))
            if count:
                step[np.arange(count), self.groups_[positions]] = drawn_h
            prior = np.cumsum(step, axis=0) - step
            by_group = np.maximum(self._group_sums[None, :] - prior, 0.0)
        high, low, min_probability = self._buckets.ranges(scale_u, scale_flat)
        self._leave(positions)
        return DrawBatch(
            positions=positions,
            probabilities=probabilities,
            remaining_counts=n - np.arange(count, dtype=np.int64),
            remaining_expected_loss=remaining_expected_loss,
            remaining_expected_loss_by_group=by_group,
            correction_low=low,
            correction_high=high,
            min_probability=min_probability,
        )

    def _usefulness_without(self, drawn: dict[int, float], cleared: set[int]) -> float:
        """Sum of u over the candidates minus ``drawn``, from the tree (exact up to the
        pairwise sum's rounding): clear the drawn leaves, read the root, restore the ones
        the sampling still needs."""
        restore = np.array([row for row in drawn if row not in cleared], dtype=np.int64)
        self._weights.set(restore, 0.0)
        value = float(self._weights.total)
        self._weights.set(restore, np.array([drawn[row] for row in restore.tolist()]))
        return value
