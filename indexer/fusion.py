"""Rank fusion: pure functions over rankings of ids."""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from typing import TypeVar

K = TypeVar("K", bound=Hashable)

# Cormack, Clarke and Büttcher, "Reciprocal rank fusion outperforms Condorcet and
# individual rank learning methods", SIGIR 2009: k = 60.
RRF_K = 60


def reciprocal_rank_fusion(
    rankings: Sequence[Sequence[K]],
    k: int = RRF_K,
    weights: Sequence[float] | None = None,
) -> list[tuple[K, float]]:
    """Fuse rankings (best first) by reciprocal rank: score(d) = Σ w_i / (k + rank_i(d)).

    Ranks are 1-based; an id missing from a ranking adds nothing for it. An id
    repeated within one ranking counts at its best rank only. Ties are broken
    by the best single rank, then by first appearance, so the result is
    deterministic. Returns (id, score) pairs, best first.
    """
    if k < 0:
        raise ValueError(f"k={k} must be 0 or more")
    if weights is None:
        weights = [1.0] * len(rankings)
    if len(weights) != len(rankings):
        raise ValueError("one weight per ranking")
    score: dict[K, float] = {}
    best: dict[K, int] = {}
    order: dict[K, int] = {}
    for ranking, w in zip(rankings, weights, strict=True):
        seen: set[K] = set()
        for rank, item in enumerate(ranking, start=1):
            if item in seen:
                continue
            seen.add(item)
            score[item] = score.get(item, 0.0) + w / (k + rank)
            best[item] = min(best.get(item, rank), rank)
            order.setdefault(item, len(order))
    return sorted(score.items(), key=lambda kv: (-kv[1], best[kv[0]], order[kv[0]]))
