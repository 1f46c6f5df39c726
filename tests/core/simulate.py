"""Test helper: run the selection loop on a fully labeled pool and build the ledger arrays.

Not a mock: it draws, logs and builds ``DrawTerms`` / ``PlugInSums`` with the service's own
ledger (``leadline.service.engine.ledger``: ``select``, ``DrawLedger``), the path the
server takes for the whole-pool scope, with the plain usefulness sqrt(E[(L - g)^2]) (or
the one given) in place of the server's hedged rule.
"""

from __future__ import annotations

import numpy as np

from leadline.service.engine.ledger import DrawLedger, select
from leadline.service.estimation import DrawTerms, PlugInSums, Reliance, SurrogateScores


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
) -> tuple[np.ndarray, DrawLedger]:
    """Draw ``draws`` items in batches; returns the drawn pool indices and the ledger."""
    n = losses.shape[0]
    u_all = np.sqrt(second_moment) if usefulness is None else usefulness
    remaining = np.arange(n)
    ledger = DrawLedger()
    picked: list[int] = []
    while len(picked) < draws:
        k = min(batch, draws - len(picked))
        scores = SurrogateScores(
            expected_loss=expected_loss[remaining],
            residual_second_moment=second_moment[remaining],
            spread=np.zeros(remaining.shape[0]),
        )
        left = remaining
        selection = select(
            scores,
            k,
            reliance=Reliance(floor=floor),
            loss_bound=loss_bound,
            rng=rng,
            rule=lambda _seen, left=left: u_all[left],
        )
        chosen = remaining[selection.positions]
        ledger.record(selection, rows=chosen, surrogate_version=0, arrival_mark=n)
        picked.extend(chosen.tolist())
        remaining = np.setdiff1d(remaining, chosen, assume_unique=True)
    return np.array(picked, dtype=np.int64), ledger


def pool_terms(
    losses: np.ndarray,
    expected_loss: np.ndarray,
    second_moment: np.ndarray,
    picked: np.ndarray,
    ledger: DrawLedger,
    *,
    upto: int | None = None,
) -> tuple[DrawTerms, PlugInSums]:
    """Whole-pool DrawTerms / PlugInSums after the first ``upto`` draws, all labeled."""
    n = losses.shape[0]
    m = picked.shape[0] if upto is None else upto
    first = DrawLedger()
    first.append([ledger.at(index) for index in range(m)])
    first.set_labels(np.arange(m), losses[picked[:m]], losses[picked[:m]])
    unlabeled = np.ones(n, dtype=bool)
    unlabeled[picked[:m]] = False
    terms = first.terms(item_count=n, cold_expected_loss=np.zeros(n), loss_bound=1.0)
    sums = first.plug_in_sums(
        unlabeled=unlabeled, expected_loss=expected_loss, second_moment=second_moment
    )
    return terms, sums
