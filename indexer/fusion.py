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


def fusion_depth(
    collection_size: int, *, share: float = 0.02, low: int = 5, high: int = 100
) -> int:
    """How many top entries of each ranking take part in the first tier of a fusion.

    About 2% of the collection, between 5 and 100 (this project's choice,
    tuned on its demo wiki and checked on the benchmark collections): when
    each ranking contributes a large share of a small collection, nearly
    every item appears in both rankings and RRF degenerates into rank
    averaging, burying an item only one ranking found at its top.
    """
    return max(low, min(high, int(collection_size * share)))


def tiered_fusion(
    rankings: Sequence[Sequence[K]], depth: int, k: int = RRF_K
) -> list[tuple[K, float]]:
    """RRF of the rankings cut to ``depth``, then the RRF of the full rankings for the rest.

    The first tier decides the top; the second keeps every candidate for
    recall. Second-tier scores are offset below the lowest first-tier score,
    so scores stay in rank order.
    """
    top = reciprocal_rank_fusion([r[:depth] for r in rankings], k=k)
    seen = {item for item, _ in top}
    floor = top[-1][1] if top else 0.0
    rest = [(i, s) for i, s in reciprocal_rank_fusion(rankings, k=k) if i not in seen]
    # Second-tier RRF scores can exceed first-tier ones; squeeze them under the floor.
    scale = floor / (rest[0][1] * 2) if rest and floor > 0 else 1.0
    return top + [(i, s * scale) for i, s in rest]
