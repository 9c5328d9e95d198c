"""Paired significance tests over per-query scores of two systems.

Pure functions over two equal-length arrays (system A, system B, one value
per query). Two tests, both two-sided:

- the paired t-test (Student 1908; as in Smucker, Allan and Carterette,
  CIKM 2007, for IR evaluation), computed by ``scipy.stats.ttest_rel``;
- the paired randomisation (sign-flip permutation) test, exact for up to
  ``EXACT_MAX`` queries and Monte Carlo, seeded, above.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

EXACT_MAX = 16


@dataclass(frozen=True)
class PairedTest:
    """Result of a paired test of B against A."""

    mean_difference: float  # mean of (B - A)
    statistic: float
    p_value: float
    method: str


def paired_t_test(a: np.ndarray, b: np.ndarray) -> PairedTest:
    """Two-sided paired t-test of the mean of ``b - a`` against 0 (``scipy.stats.ttest_rel``).

    Degenerate inputs, where scipy answers nan, get a definite answer: fewer
    than two queries, or differences without spread, are "not different"
    unless the shift is non-zero.
    """
    d = _differences(a, b)
    n = len(d)
    mean = float(d.mean()) if n else math.nan
    if n < 2:
        return PairedTest(mean, math.nan, 1.0, "paired t-test")
    if float(d.std(ddof=1)) == 0.0:
        # No spread: identical systems are not different; a constant shift is.
        return PairedTest(
            mean, math.inf if mean else math.nan, 0.0 if mean else 1.0, "paired t-test"
        )
    result = stats.ttest_rel(np.asarray(b, dtype=np.float64), np.asarray(a, dtype=np.float64))
    return PairedTest(mean, float(result.statistic), float(result.pvalue), "paired t-test")


def randomisation_test(
    a: np.ndarray, b: np.ndarray, *, resamples: int = 10_000, seed: int = 0
) -> PairedTest:
    """Two-sided paired randomisation test on the mean difference.

    Under the null hypothesis each query's difference is as likely negative
    as positive, so every sign pattern is equally likely. The p-value is the
    share of sign patterns whose mean difference is at least as far from 0
    as the observed one: all 2^n patterns when n <= EXACT_MAX, otherwise
    ``resamples`` random ones (observed pattern counted, so p > 0).
    """
    d = _differences(a, b)
    n = len(d)
    observed = float(d.mean()) if n else 0.0
    if n == 0:
        return PairedTest(0.0, 0.0, 1.0, "randomisation test")
    # Compare with a relative tolerance so float noise does not flip ties.
    eps = 1e-12 * max(1.0, float(np.abs(d).max()))
    if n <= EXACT_MAX:
        signs = np.array(list(itertools.product((1.0, -1.0), repeat=n)))
        means = signs @ d / n
        p = float(np.mean(np.abs(means) >= abs(observed) - eps))
        return PairedTest(observed, observed, p, "randomisation test (exact)")
    rng = np.random.default_rng(seed)
    hits = 0
    for start in range(0, resamples, 1000):
        m = min(1000, resamples - start)
        signs = rng.choice((-1.0, 1.0), size=(m, n))
        hits += int(np.sum(np.abs(signs @ d / n) >= abs(observed) - eps))
    p = (hits + 1) / (resamples + 1)
    return PairedTest(observed, observed, p, f"randomisation test ({resamples} resamples)")


def _differences(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape != b.shape or a.ndim != 1:
        raise ValueError("a and b must be 1-d arrays of equal length (one value per query)")
    difference: np.ndarray = b - a
    return difference
