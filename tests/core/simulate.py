"""Test helper: run the selection loop on a fully labeled pool and build the ledger arrays.

Not a mock: it calls the real ``draw_batch`` and builds ``DrawTerms`` the way the service
does for the whole-pool scope (and optionally a segment scope).
"""

from __future__ import annotations

import numpy as np

from leadline.service.estimation import (
    DRAW_LABELED,
    DrawTerms,
    PlugInSums,
    draw_batch,
)


def run_draws(
    losses: np.ndarray,
    expected_loss: np.ndarray,
    second_moment: np.ndarray,
    *,
    draws: int,
    batch: int,
    floor: float,
    loss_bound: float,
    rng: np.random.Generator,
    usefulness: np.ndarray | None = None,
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Draw ``draws`` items in batches; returns drawn pool indices and per-draw logs."""
    n = losses.shape[0]
    u_all = np.sqrt(second_moment) if usefulness is None else usefulness
    remaining = np.arange(n)
    logs: dict[str, list[np.ndarray]] = {
        k: [] for k in ("probability", "remaining", "low", "high", "count")
    }
    picked = []
    while len(picked) < draws:
        k = min(batch, draws - len(picked))
        b = draw_batch(
            u_all[remaining],
            expected_loss[remaining],
            k,
            floor=floor,
            loss_bound=loss_bound,
            rng=rng,
        )
        chosen = remaining[b.positions]
        picked.extend(chosen.tolist())
        logs["probability"].append(b.probabilities)
        logs["remaining"].append(b.remaining_expected_loss)
        logs["low"].append(b.correction_low)
        logs["high"].append(b.correction_high)
        logs["count"].append(b.remaining_counts.astype(np.float64))
        remaining = np.setdiff1d(remaining, chosen, assume_unique=True)
    return np.array(picked, dtype=np.int64), {k: np.concatenate(v) for k, v in logs.items()}


def pool_terms(
    losses: np.ndarray,
    expected_loss: np.ndarray,
    second_moment: np.ndarray,
    picked: np.ndarray,
    logs: dict[str, np.ndarray],
    *,
    upto: int | None = None,
) -> tuple[DrawTerms, PlugInSums]:
    """Whole-pool DrawTerms / PlugInSums after the first ``upto`` draws, all labeled."""
    m = picked.shape[0] if upto is None else upto
    idx = picked[:m]
    terms = DrawTerms(
        probability=logs["probability"][:m],
        expected_loss=expected_loss[idx],
        remaining_expected_loss=logs["remaining"][:m],
        late_expected_loss=np.zeros(m),
        late_count=np.zeros(m, dtype=np.int64),
        in_scope=np.ones(m, dtype=bool),
        status=np.full(m, DRAW_LABELED),
        loss=losses[idx],
        correction_low=logs["low"][:m],
        correction_high=logs["high"][:m],
        residual_second_moment=second_moment[idx],
        remaining_count=logs["count"][:m],
    )
    rest = np.ones(losses.shape[0], dtype=bool)
    rest[idx] = False
    sums = PlugInSums(
        scope_size=losses.shape[0],
        labeled_loss_sum=float(losses[idx].sum()),
        unlabeled_expected_loss_sum=float(expected_loss[rest].sum()),
        unlabeled_second_moment_sum=float(second_moment[rest].sum()),
        unlabeled_count=int(rest.sum()),
    )
    return terms, sums
