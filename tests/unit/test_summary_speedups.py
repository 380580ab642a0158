"""The summary's faster paths give the very numbers of the plain ones they replace.

Each check runs the fast path and a plain reference (scipy's own test, the whole grid of the pair
statistic) on seeded inputs and asks for equal floats, not close ones.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from server.analytics import compare, shares


def _scipy_p_values(k: np.ndarray, n: int, p: np.ndarray) -> np.ndarray:
    return np.array([stats.binomtest(int(a), n, float(b)).pvalue for a, b in zip(k, p, strict=True)])


@pytest.mark.parametrize("seed", range(6))
def test_binomial_test_on_many_homes_is_scipys_binomtest(seed):
    rng = np.random.default_rng(seed)
    for _ in range(40):
        homes = int(rng.integers(2, 60))
        t = rng.uniform(0.01, 3.0, homes)
        k = rng.poisson(rng.gamma(float(rng.choice([0.3, 1.0, 5.0])), 2.0, homes) * t).astype(float)
        if k.sum() == 0:
            k[0] = 1
        share = t / t.sum()
        n = int(k.sum())
        assert np.array_equal(shares.binom_test_two_sided(k, n, share), _scipy_p_values(k, n, share))


def test_binomial_test_at_the_mode_and_with_large_counts():
    # k exactly at n p gives 1; large n exercises a long binary search on both sides.
    share = np.array([0.25, 0.25, 0.5])
    assert np.array_equal(shares.binom_test_two_sided(np.array([5.0, 5.0, 10.0]), 20, share), [1.0, 1.0, 1.0])
    k = np.arange(0, 40001, 997, dtype=float)
    p = np.full(len(k), 1 / 7)
    assert np.array_equal(shares.binom_test_two_sided(k, 40000, p), _scipy_p_values(k, 40000, p))


def _whole_grid_pair_test(xa, ta, xb, tb, df, level):
    """The pair test with the statistic computed on every grid point, walked one point at a time."""
    xa_sum, xb_sum = float(xa.sum()), float(xb.sum())
    big_ta, big_tb = float(ta.sum()), float(tb.sum())
    q = float(stats.t.ppf(1 - (1 - level) / 2, df))
    bound = compare._BOUND
    if xa_sum > 0 and xb_sum > 0:
        centre = math.log((xa_sum / big_ta) / (xb_sum / big_tb))
    else:
        centre = bound if xa_sum > 0 else -bound
    centre = min(max(centre, -bound), bound)
    grid = np.unique(
        np.concatenate([np.arange(-bound, bound + compare._STEP / 2, compare._STEP), [0.0, centre]])
    )
    stat = compare._pair_t(xa, ta, xb, tb, grid)
    at, zero = int(np.searchsorted(grid, centre)), int(np.searchsorted(grid, 0.0))
    p = float(2 * stats.t.sf(float(np.abs(stat[min(at, zero) : max(at, zero) + 1]).max()), df))

    def edge(step):
        i = at
        while 0 <= i + step < len(grid):
            j = i + step
            if abs(stat[j]) > q:
                target = math.copysign(q, stat[j])

                def f(d, target=target):
                    return float(compare._pair_t(xa, ta, xb, tb, d)[0]) - target

                lo, hi = sorted((grid[i], grid[j]))
                return float(optimize.brentq(f, lo, hi, xtol=1e-10)) if f(lo) * f(hi) < 0 else float(grid[j])
            i = j
        return step * math.inf

    low = 0.0 if xa_sum == 0 else math.exp(edge(-1))
    high = math.inf if xb_sum == 0 else math.exp(edge(1))
    est = (xa_sum / big_ta) / (xb_sum / big_tb) if xb_sum > 0 else math.inf
    return est, low, high, p


@pytest.mark.parametrize("seed", range(4))
def test_pair_test_evaluates_only_what_it_needs_and_gives_the_whole_grid_answer(seed):
    rng = np.random.default_rng(seed)
    checked = 0
    for case in range(60):
        g = int(rng.integers(3, 80))
        ta = rng.uniform(0, 2, g) * (rng.random(g) < 0.7)
        tb = rng.uniform(0, 2, g) * (rng.random(g) < 0.7)
        lam = rng.gamma(float(rng.choice([0.2, 1.0, 4.0])), 1.5, g)
        xa = rng.poisson(lam * ta * float(rng.choice([0.3, 1.0, 3.0]))).astype(float)
        xb = rng.poisson(lam * tb).astype(float)
        if case % 5 == 1:
            xa[:] = 0
        elif case % 5 == 2:
            xb[:] = 0
        elif case % 5 == 3:  # one home with most false alarms: the clustered statistic bends back
            xa[0] += 200
            ta[0] = max(ta[0], 0.5)
        if ta.sum() == 0 or tb.sum() == 0 or xa.sum() + xb.sum() == 0:
            continue
        level = float(rng.choice([0.9, 0.95, 0.99]))
        fast = compare._pair_test(xa, ta, xb, tb, g - 1, level)
        plain = _whole_grid_pair_test(xa, ta, xb, tb, g - 1, level)
        assert fast == plain
        checked += 1
    assert checked >= 40
