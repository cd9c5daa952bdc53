"""Runs and trend tests on residuals (pkcalc.fit.residuals) against independent computations.

References named beside each check:
- brute-force enumeration of every arrangement of the signs (exact, independent);
- the Wald-Wolfowitz normal approximation of the number of runs (Wald & Wolfowitz,
  Ann Math Stat 1940;11:147 -- mean and variance from memory);
- scipy.stats.spearmanr (independent implementation of Spearman's test).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm, spearmanr

from pkcalc.fit.residuals import runs_count, runs_test, trend_test


def brute_force_p(signs: list[int]) -> float:
    """P(runs <= observed) over every placement of the positive signs (equally likely)."""
    n, n_pos = len(signs), sum(s > 0 for s in signs)
    observed = runs_count(np.array(signs))
    total = hits = 0
    for pos in itertools.combinations(range(n), n_pos):
        arr = -np.ones(n)
        arr[list(pos)] = 1
        total += 1
        hits += runs_count(arr) <= observed
    return hits / total


@settings(max_examples=150, deadline=None)
@given(st.lists(st.sampled_from([-1, 1]), min_size=3, max_size=12))
def test_runs_p_equals_brute_force_enumeration(signs):
    runs, p = runs_test(np.array(signs, float))
    if all(s > 0 for s in signs) or all(s < 0 for s in signs):
        assert p is None
        return
    assert runs == runs_count(np.array(signs))
    assert math.isclose(p, brute_force_p(signs), rel_tol=1e-12, abs_tol=1e-15)


def test_runs_p_approaches_the_wald_wolfowitz_normal_approximation():
    # Large samples: the exact lower tail is close to the normal approximation with a
    # continuity correction, mean 2 n+ n- / n + 1, variance
    # 2 n+ n- (2 n+ n- - n) / (n^2 (n - 1)).
    rng = np.random.default_rng(11)
    for _ in range(20):
        x = rng.normal(size=80)
        x[:30] = np.abs(x[:30]) * rng.choice([1, 1, 1, -1], 30)   # some clustering
        runs, p = runs_test(x)
        n_pos, n_neg = int((x > 0).sum()), int((x < 0).sum())
        n = n_pos + n_neg
        mean = 2 * n_pos * n_neg / n + 1
        var = 2 * n_pos * n_neg * (2 * n_pos * n_neg - n) / (n * n * (n - 1))
        approx = norm.cdf((runs + 0.5 - mean) / math.sqrt(var))
        assert abs(p - approx) < 0.02, (p, approx)


def test_runs_ignores_zero_and_missing_residuals():
    assert runs_test(np.array([1.0, 0.0, np.nan, -1.0])) == (2, None)        # too few left
    assert runs_test(np.array([1.0, 0.0, np.nan, 1.0, -1.0]))[0] == 2       # zero, NaN skipped
    assert runs_test(np.array([1.0, 1.0, 1.0])) == (1, None)                # one sign


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-3, 3, allow_nan=False), min_size=4, max_size=30),
       st.integers(0, 2**31 - 1))
def test_trend_p_equals_scipy_spearman(resid, seed):
    # Reference: scipy.stats.spearmanr, ties included (times rounded to whole hours).
    x = np.array(resid)
    t = np.round(np.random.default_rng(seed).uniform(0, 10, x.size))
    ours = trend_test(x, t)
    if np.ptp(x) == 0 or np.ptp(t) == 0:
        assert ours is None
        return
    ref = spearmanr(t, x).pvalue
    assert math.isclose(ours, ref, rel_tol=1e-9, abs_tol=1e-12)


def test_trend_needs_four_levels():
    assert trend_test(np.array([1.0, -1.0, 2.0]), np.array([1.0, 2.0, 3.0])) is None
