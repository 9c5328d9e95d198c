"""Paired significance tests agree with scipy's own on the same per-query numbers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sounding.indexer.significance import EXACT_MAX, paired_t_test, randomisation_test


def pairs(seed: int, n: int, shift: float) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = rng.uniform(0, 1, n)
    return a, np.clip(a + shift + rng.normal(0, 0.2, n), 0, 1)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize(("n", "shift"), [(5, 0.0), (30, 0.05), (300, 0.02), (50, -0.1)])
def test_t_test_matches_scipy_ttest_rel(seed: int, n: int, shift: float) -> None:
    a, b = pairs(seed, n, shift)
    ours = paired_t_test(a, b)
    ref = stats.ttest_rel(b, a)  # scipy.stats: two-sided paired t-test
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-9)
    assert ours.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert ours.mean_difference == pytest.approx(float(np.mean(b - a)))


def test_t_test_is_scipy_ttest_rel_on_a_worked_example() -> None:
    # Reference: scipy.stats.ttest_rel (two-sided); the figure by hand is
    # t = mean(d) / (sd(d) / sqrt(n)) with d = b - a = (0.1, 0.2, -0.1, 0.3).
    a = np.array([0.1, 0.5, 0.9, 0.3])
    b = np.array([0.2, 0.7, 0.8, 0.6])
    ours = paired_t_test(a, b)
    ref = stats.ttest_rel(b, a)
    assert (ours.statistic, ours.p_value) == (float(ref.statistic), float(ref.pvalue))
    d = b - a
    assert ours.statistic == pytest.approx(d.mean() / (d.std(ddof=1) / 2.0), rel=1e-12)
    assert ours.p_value == pytest.approx(2 * stats.t.sf(ours.statistic, df=3), rel=1e-12)


def test_t_test_answers_where_scipy_gives_nan() -> None:
    one = paired_t_test(np.array([0.2]), np.array([0.4]))
    assert one.p_value == 1.0 and np.isnan(one.statistic)
    constant = paired_t_test(np.zeros(3), np.full(3, 0.5))
    assert constant.p_value == 0.0 and constant.statistic == float("inf")


def _scipy_permutation(a: np.ndarray, b: np.ndarray, n_resamples: float) -> float:
    # scipy.stats.permutation_test with permutation_type="samples" flips each pair,
    # i.e. the sign of each paired difference: the same null as ours.
    def mean_diff(x: np.ndarray, y: np.ndarray, axis: int) -> np.ndarray:
        return np.mean(y - x, axis=axis)

    return stats.permutation_test(
        (a, b),
        mean_diff,
        permutation_type="samples",
        vectorized=True,
        n_resamples=n_resamples,
        alternative="two-sided",
    ).pvalue


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("n", [3, 8, EXACT_MAX])
def test_exact_randomisation_matches_scipy_exact_permutation_test(seed: int, n: int) -> None:
    a, b = pairs(seed, n, 0.1)
    ours = randomisation_test(a, b)
    assert "exact" in ours.method
    assert ours.p_value == pytest.approx(_scipy_permutation(a, b, np.inf), abs=1e-9)


@pytest.mark.parametrize("seed", range(3))
def test_sampled_randomisation_is_close_to_scipy(seed: int) -> None:
    a, b = pairs(seed, 60, 0.03)
    ours = randomisation_test(a, b, resamples=20_000, seed=seed)
    ref = _scipy_permutation(a, b, 20_000)
    # Both are Monte Carlo estimates of one p-value; 20,000 resamples put their
    # standard error near 0.0035, so they agree well within 0.02.
    assert abs(ours.p_value - ref) < 0.02


@pytest.mark.parametrize("test", [paired_t_test, randomisation_test])
def test_identical_systems_are_not_different(test) -> None:
    a = np.array([0.1, 0.5, 0.9, 0.3])
    assert test(a, a.copy()).p_value == 1.0


def test_unequal_lengths_are_refused() -> None:
    with pytest.raises(ValueError, match="equal length"):
        paired_t_test(np.zeros(3), np.zeros(4))
