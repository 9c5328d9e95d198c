"""Reciprocal rank fusion, checked against its definition."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from sounding.indexer.fusion import RRF_K, fusion_depth, reciprocal_rank_fusion, tiered_fusion


def test_default_k_is_the_published_sixty() -> None:
    # Cormack, Clarke and Büttcher, SIGIR 2009, use k = 60: fusing without naming k
    # scores by 1 / (60 + rank), as the formula with k = 60 does.
    got = dict(reciprocal_rank_fusion([["a", "b"], ["b"]]))
    assert got == pytest.approx({"a": 1 / 61, "b": 1 / 62 + 1 / 61})
    assert RRF_K == 60


@pytest.mark.parametrize(
    ("rankings", "k", "expected"),
    [
        # Formula of Cormack et al. 2009: RRF(d) = sum over rankings of 1 / (k + rank(d)).
        ([["a", "b"], ["b", "a"]], 60, [("a", 1 / 61 + 1 / 62), ("b", 1 / 62 + 1 / 61)]),
        ([["a", "b", "c"], ["c"]], 60, [("c", 1 / 63 + 1 / 61), ("a", 1 / 61), ("b", 1 / 62)]),
        ([["x"], []], 0, [("x", 1.0)]),
        ([[], []], 60, []),
        ([["a", "a", "b"]], 1, [("a", 1 / 2), ("b", 1 / 4)]),  # repeats count once, at best rank
        # A tie (same score, same best rank) goes to the id seen first.
        ([[3, 1, 2], [1, 3]], 10, [(3, 1 / 11 + 1 / 12), (1, 1 / 12 + 1 / 11), (2, 1 / 13)]),
    ],
)
def test_scores_follow_the_formula(rankings, k, expected) -> None:
    got = reciprocal_rank_fusion(rankings, k=k)
    assert [i for i, _ in got] == [i for i, _ in expected]
    assert [s for _, s in got] == pytest.approx([s for _, s in expected])


def test_weights_scale_each_ranking() -> None:
    got = dict(reciprocal_rank_fusion([["a"], ["b"]], k=0, weights=[1.0, 3.0]))
    assert got == {"a": 1.0, "b": 3.0}


@pytest.mark.parametrize(("k", "weights"), [(-1, None), (60, [1.0])])
def test_bad_arguments_raise(k, weights) -> None:
    with pytest.raises(ValueError):
        reciprocal_rank_fusion([["a"], ["b"]], k=k, weights=weights)


@given(st.lists(st.lists(st.integers(0, 30), max_size=20), min_size=1, max_size=4))
def test_fusion_is_a_ranking_of_the_union(rankings) -> None:
    fused = reciprocal_rank_fusion(rankings)
    ids = [i for i, _ in fused]
    assert len(ids) == len(set(ids)) and set(ids) == {i for r in rankings for i in r}
    scores = [s for _, s in fused]
    assert scores == sorted(scores, reverse=True)


@given(st.permutations(list(range(12))))
def test_one_ranking_is_returned_unchanged(order) -> None:
    assert [i for i, _ in reciprocal_rank_fusion([order])] == list(order)


@pytest.mark.parametrize(
    ("size", "expected"), [(0, 5), (352, 7), (1033, 20), (3204, 64), (5183, 100), (10**6, 100)]
)
def test_fusion_depth_is_two_percent_within_bounds(size: int, expected: int) -> None:
    assert fusion_depth(size) == expected


def test_tiered_fusion_lets_shallow_ranks_decide_the_top() -> None:
    # Item "a" tops ranking one only; "b".."e" sit low in both. A full-depth RRF
    # lets the items found by both outrank "a"; the first tier (depth 2) does not.
    one = ["a", "x", "b", "c", "d", "e"]
    two = ["y", "z", "b", "c", "d", "e"]
    full = [i for i, _ in reciprocal_rank_fusion([one, two])]
    assert full.index("a") > full.index("b")
    tiered = tiered_fusion([one, two], depth=2)
    assert [i for i, _ in tiered][:4] == [i for i, _ in reciprocal_rank_fusion([one[:2], two[:2]])]
    assert {i for i, _ in tiered} == set(one) | set(two)
    scores = [s for _, s in tiered]
    assert scores == sorted(scores, reverse=True)


@given(
    st.lists(st.lists(st.integers(0, 40), max_size=30, unique=True), min_size=1, max_size=3),
    st.integers(1, 30),
)
def test_tiered_fusion_keeps_every_candidate_in_score_order(rankings, depth) -> None:
    fused = tiered_fusion(rankings, depth)
    ids = [i for i, _ in fused]
    assert len(ids) == len(set(ids)) and set(ids) == {i for r in rankings for i in r}
    assert [s for _, s in fused] == sorted((s for _, s in fused), reverse=True)
