"""A draw as the engine logs it and the store keeps it: :class:`DrawRecord` and its
:class:`DrawStatus`.

Shared by the engine's ledger (:mod:`leadline.service.engine.ledger`) and the store's
draws table, which may not import each other (data flows api -> engine -> store).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

import numpy as np

__all__ = ["DrawRecord", "DrawStatus"]


class DrawStatus(enum.IntEnum):
    """Where a draw stands. The store keeps these numbers; the wire's ``DrawStatus``
    (``leadline.service.api.vocabulary``) and the core's ``DRAW_*`` codes
    (``leadline.service.engine.ledger``) are mapped explicitly, and tests pin both maps."""

    #: Held by a labeler under a lease (or its lease ended and it waits to be re-offered).
    ASSIGNED = 1
    LABELED = 2
    SKIPPED = 3
    #: Given back by a release; re-offered first.
    WAITING = 4


@dataclass(frozen=True, kw_only=True, eq=False)
class DrawRecord:
    """One draw: what was logged when it was made, then its lease and outcome.

    The draw-time fields (``row`` .. ``arrival_mark``) never change. ``probability`` is
    q_m(i_m); ``remaining_count`` |U_m|; ``remaining_expected_loss`` the sum of the control
    variate h over U_m, ``remaining_by_segment`` the same per segment code;
    ``correction_low`` / ``correction_high`` the predictable range of (L - h) / q over U_m
    and ``min_probability`` the smallest q over U_m; ``expected_loss`` h at the drawn item
    and ``second_moment`` its predicted E[(L - h)^2]; ``arrival_mark`` the item count when
    the draw was made.
    """

    draw_index: int
    row: int
    probability: float
    remaining_count: int
    remaining_expected_loss: float
    remaining_by_segment: np.ndarray
    correction_low: float
    correction_high: float
    min_probability: float
    expected_loss: float
    second_moment: float
    surrogate_version: int
    arrival_mark: int
    draw_time_ms: int
    status: DrawStatus = DrawStatus.ASSIGNED
    labeler: str = ""
    holder: str = ""
    assignment_id: str = ""
    lease_expire_ms: int = 0
    label: float | None = None
    loss: float | None = None
    label_time_ms: int = 0
    skip_reason: str = ""
