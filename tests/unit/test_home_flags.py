"""Homes above target with a multiplicity correction; concentration against time and chance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from server.analytics import shares


def _homes(k, t):
    return pd.DataFrame(
        {"home_code": [f"H{i:02d}" for i in range(len(k))], "false_alarms": k, "home_months": t}
    )


@pytest.mark.parametrize(("ours", "theirs"), [("holm", "holm"), ("bh", "fdr_bh")])
def test_adjusted_p_values_match_statsmodels(ours, theirs):
    # Reference: statsmodels.stats.multitest.multipletests (Holm 1979; Benjamini & Hochberg 1995).
    p = np.array([0.01, 0.04, 0.03, 0.005, 0.5, 0.2, 0.04])
    assert shares.adjust_p(p, ours) == pytest.approx(multipletests(p, method=theirs)[1])
    with_nan = shares.adjust_p(np.array([0.01, np.nan, 0.04]), ours)
    assert np.isnan(with_nan[1])
    assert with_nan[[0, 2]] == pytest.approx(multipletests([0.01, 0.04], method=theirs)[1])


def test_one_sided_exact_p_per_home():
    # p = P(X >= k | mu = target T): 7 false alarms in 2 home-months at target 1 -> Poisson(2)
    # tail at 7 = 0.004534 (scipy.stats.poisson.sf(6, 2)).
    r = shares.homes_above_target_adjusted(_homes([7, 0, 2], [2.0, 2.0, 2.0]), 1.0)
    t = r.table.set_index("home_code")
    assert t.loc["H00", "p_value"] == pytest.approx(stats.poisson.sf(6, 2.0))
    assert t.loc["H00", "p_value"] == pytest.approx(0.004534, abs=5e-7)
    assert t.loc["H01", "p_value"] == 1.0
    assert t.loc["H00", "p_adjusted"] == pytest.approx(3 * stats.poisson.sf(6, 2.0))
    assert r.clearly_above_codes == ("H00",) and r.above == 1
    assert "Holm" in r.method_text


def test_homes_at_target_are_rarely_named():
    # 400 pilots of 40 homes, every home exactly at the target: the chance of naming any home must
    # stay near 5% at most (Holm controls it at alpha).
    rng = np.random.default_rng(12)
    named = 0
    for _ in range(400):
        t = rng.uniform(1.0, 4.0, 40)
        named += shares.homes_above_target_adjusted(_homes(rng.poisson(1.0 * t), t), 1.0).clearly_above > 0
    assert named / 400 <= 0.06


def test_exposure_gini_is_zero_for_equal_rates_and_matches_checks_md_when_time_is_equal():
    assert shares.exposure_gini([2, 4, 6], [1.0, 2.0, 3.0])[0] == pytest.approx(0.0)
    # Equal time: the Lorenz form gives the population Gini of checks.md section 8
    # (0,...,0,10 -> 0.9; 1..5 -> 4/15), closed forms of the mean-difference definition.
    assert shares.exposure_gini([0] * 9 + [10], [1.0] * 10)[0] == pytest.approx(0.9)
    assert shares.exposure_gini([1, 2, 3, 4, 5], [1.0] * 5)[0] == pytest.approx(4 / 15)
    assert np.isnan(shares.exposure_gini([0, 0], [1.0, 1.0])[0])


def test_exposure_concentration_against_chance():
    # Raw counts look concentrated, but the homes simply had different time: not beyond chance.
    t = np.array([0.2, 0.2, 0.2, 0.2, 0.2, 0.2, 0.2, 0.2, 6.0, 6.0])
    k = np.array([0, 0, 1, 0, 0, 0, 0, 1, 12, 11])
    assert shares.gini(k) > 0.6
    c = shares.exposure_concentration(_homes(k, t), rng=np.random.default_rng(1), draws=2000)
    assert not c.beyond_chance and c.stands_out_codes == ()
    assert c.null_low <= c.null_median <= c.null_high
    # One home with twenty times the rate of the others stands out and lifts the figure.
    k2 = np.array([1, 1, 1, 1, 1, 1, 1, 1, 1, 20])
    c2 = shares.exposure_concentration(_homes(k2, [1.0] * 10), rng=np.random.default_rng(1), draws=2000)
    assert c2.beyond_chance and c2.gini > c2.null_high
    assert c2.stands_out_codes == ("H09",)
    row = c2.table.set_index("home_code").loc["H09"]
    # Per-home test: scipy binomtest(20, 29, 0.1), two-sided, times 10 (Holm's first step).
    assert row["p_value"] == pytest.approx(stats.binomtest(20, 29, 0.1).pvalue)
    assert row["p_adjusted"] == pytest.approx(min(1.0, 10 * stats.binomtest(20, 29, 0.1).pvalue))


def test_exposure_concentration_is_seeded_and_handles_no_false_alarms():
    h = _homes([3, 0, 5, 1, 2], [1.0, 2.0, 1.0, 1.5, 1.0])
    a = shares.exposure_concentration(h, rng=np.random.default_rng(9))
    b = shares.exposure_concentration(h, rng=np.random.default_rng(9))
    assert (a.null_low, a.null_high, a.p_value) == (b.null_low, b.null_high, b.p_value)
    none = shares.exposure_concentration(_homes([0, 0, 0], [1.0, 1.0, 1.0]), rng=np.random.default_rng(0))
    assert none.reason == shares.NO_FALSE_ALARMS and np.isnan(none.gini) and not none.beyond_chance
