"""Rates, proportions, rate ratios, bootstrap, overdispersion, readiness and breakdowns."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats import rates as sm_rates
from statsmodels.stats.proportion import proportion_confint

from server.analytics import breakdowns, rates

# Published figures are compared to half a unit in their last printed digit (checks.md).
PUB3 = 0.0005
PUB4 = 0.00005


# ---------------------------------------------------------------------------------------
# Garwood exact Poisson interval (checks.md section 1)


@pytest.mark.parametrize(
    ("k", "published", "full"),
    [
        # Garwood (1936) Biometrika 28:437, tabulated in Ulm (1990) Am J Epidemiol 131:373, Table 1.
        (0, (0.0, 3.689), (0.0, 3.688879)),
        (2, (0.242, 7.225), (0.242209, 7.224688)),
        (5, (1.623, 11.668), (1.623486, 11.668332)),
        (20, (12.217, 30.888), (12.216520, 30.888378)),
    ],
)
def test_garwood_limits_match_published_table(k, published, full):
    lim = rates.garwood_limits([k], 0.95)
    assert lim.low[0] == pytest.approx(published[0], abs=PUB3)
    assert lim.high[0] == pytest.approx(published[1], abs=PUB3)
    assert lim.low[0] == pytest.approx(full[0], abs=5e-7)
    assert lim.high[0] == pytest.approx(full[1], abs=5e-7)


def test_zero_events_lower_limit_is_exactly_zero():
    # Garwood (1936): the chi-square with 0 degrees of freedom is undefined, the limit is 0.
    r = rates.poisson_rate(0, 12.0)
    assert r.low == 0.0
    assert r.estimate == 0.0
    assert r.high == pytest.approx(3.688879 / 12.0, abs=1e-7)


def test_rate_example_five_in_twenty_five_home_months():
    # checks.md section 1, derived: the k = 5 Garwood limits divided by 25 home-months.
    r = rates.poisson_rate(5, 25.0)
    assert r.estimate == pytest.approx(0.2)
    assert r.low == pytest.approx(0.064939, abs=5e-7)
    assert r.high == pytest.approx(0.466733, abs=5e-7)
    assert (r.confidence_level, r.method) == (0.95, "garwood")


def test_no_monitored_time_gives_a_reason_not_a_number():
    r = rates.poisson_rate(3, 0.0)
    assert r.reason == rates.NO_MONITORED_TIME
    assert math.isnan(r.estimate) and math.isnan(r.low) and math.isnan(r.high)


def test_unknown_method_is_refused():
    with pytest.raises(ValueError):
        rates.poisson_rate(3, 1.0, method="wald")


# ---------------------------------------------------------------------------------------
# Zero events: one-sided bound and the rule of three (checks.md section 2)


def test_rule_of_three_one_sided_bound():
    # Hanley & Lippman-Hand (1983) JAMA 249:1743: -ln(0.05) = 2.996.
    assert rates.upper_bound_one_sided(0, 1.0) == pytest.approx(2.996, abs=PUB3)
    assert rates.upper_bound_one_sided(0, 1.0) == pytest.approx(-math.log(0.05), abs=1e-12)
    # ...divided by the exposure for a rate, and not the two-sided 95% upper limit 3.689.
    assert rates.upper_bound_one_sided(0, 10.0) == pytest.approx(0.2995732, abs=1e-7)
    assert rates.poisson_rate(0, 1.0).high == pytest.approx(3.689, abs=PUB3)


@pytest.mark.parametrize(("n", "exact", "rule"), [(20, 0.1391, 0.15), (10, 0.2589, 0.30)])
def test_binomial_zero_successes_one_sided_bound(n, exact, rule):
    # checks.md section 2, derived from the formula 1 - 0.05^(1/n); the upper end of a two-sided
    # 90% Clopper-Pearson interval is the one-sided 95% bound.
    p = rates.proportion(0, n, confidence_level=0.90, method="clopper-pearson")
    assert p.high == pytest.approx(exact, abs=PUB4)
    assert p.high == pytest.approx(1 - 0.05 ** (1 / n), abs=1e-10)
    assert p.high < rule == pytest.approx(3 / n)


# ---------------------------------------------------------------------------------------
# Proportions (checks.md section 3)


@pytest.mark.parametrize(
    ("x", "n", "method", "published", "full"),
    [
        # Newcombe (1998) Stat Med 17:857, Table I, method 3 (Wilson) and method 5 (exact).
        (81, 263, "wilson", (0.2553, 0.3662), (0.255289, 0.366210)),
        (0, 20, "wilson", (0.0000, 0.1611), (0.0, 0.161125)),
        (81, 263, "clopper-pearson", (0.2527, 0.3676), (0.252737, 0.367622)),
        (0, 20, "clopper-pearson", (0.0000, 0.1684), (0.0, 0.168433)),
    ],
)
def test_proportion_intervals_match_newcombe(x, n, method, published, full):
    p = rates.proportion(x, n, method=method)
    assert p.low == pytest.approx(published[0], abs=PUB4)
    assert p.high == pytest.approx(published[1], abs=PUB4)
    assert p.low == pytest.approx(full[0], abs=5e-7)
    assert p.high == pytest.approx(full[1], abs=5e-7)


def test_wilson_seven_of_fifty():
    # STYLE.md reference table: recomputed from Wilson's 1927 formula; Clopper-Pearson for the
    # same counts 0.0582-0.2674 (scipy binomtest documentation).
    w = rates.proportion(7, 50)
    assert (w.low, w.high) == (pytest.approx(0.0695, abs=PUB4), pytest.approx(0.2619, abs=PUB4))
    cp = rates.proportion(7, 50, method="clopper-pearson")
    assert (cp.low, cp.high) == (pytest.approx(0.0582, abs=PUB4), pytest.approx(0.2674, abs=PUB4))


@pytest.mark.parametrize("method", ["wilson", "clopper-pearson"])
def test_proportion_edges_are_exact(method):
    assert rates.proportion(0, 7, method=method).low == 0.0
    assert rates.proportion(7, 7, method=method).high == 1.0
    empty = rates.proportion(0, 0, method=method)
    assert empty.reason == rates.NO_TRIALS and math.isnan(empty.low)


@pytest.mark.parametrize("method", ["wilson", "clopper-pearson"])
@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99])
def test_proportion_agrees_with_statsmodels_and_scipy(method, level):
    sm_method = {"wilson": "wilson", "clopper-pearson": "beta"}[method]
    sp_method = {"wilson": "wilson", "clopper-pearson": "exact"}[method]
    for n in (1, 5, 20, 57, 263, 1000):
        for x in sorted({0, 1, n // 3, n // 2, n - 1, n}):
            ours = rates.proportion(x, n, confidence_level=level, method=method)
            lo, hi = proportion_confint(x, n, alpha=1 - level, method=sm_method)
            assert (ours.low, ours.high) == (pytest.approx(lo, abs=1e-9), pytest.approx(hi, abs=1e-9))
            ci = stats.binomtest(x, n).proportion_ci(level, method=sp_method)
            assert (ours.low, ours.high) == (
                pytest.approx(ci.low, abs=1e-9),
                pytest.approx(ci.high, abs=1e-9),
            )


# ---------------------------------------------------------------------------------------
# Poisson agreement and properties


@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99])
def test_poisson_rate_agrees_with_statsmodels_exact_c(level):
    for k in (0, 1, 2, 3, 7, 15, 40, 120, 1000):
        for t in (0.3, 1.0, 25.0, 400.0, 12_000.0):
            ours = rates.poisson_rate(k, t, confidence_level=level)
            lo, hi = sm_rates.confint_poisson(k, t, method="exact-c", alpha=1 - level)
            assert ours.low == pytest.approx(lo, rel=1e-10, abs=1e-14)
            assert ours.high == pytest.approx(hi, rel=1e-10)
            # The same limits through the gamma distribution (checks.md section 1).
            g_lo = stats.gamma.ppf((1 - level) / 2, k) / t if k else 0.0
            assert ours.low == pytest.approx(g_lo, rel=1e-10, abs=1e-14)
            assert ours.high == pytest.approx(stats.gamma.ppf(1 - (1 - level) / 2, k + 1) / t, rel=1e-10)


def test_statsmodels_reference_value_fifteen_in_four_hundred():
    # STYLE.md: statsmodels test suite, recorded from R DescTools PoissonCI.
    r = rates.poisson_rate(15, 400.0)
    assert (r.low, r.high) == (pytest.approx(0.020988, abs=5e-7), pytest.approx(0.061851, abs=5e-7))


def test_interval_contains_estimate_and_widens_with_level():
    for k in (0, 1, 4, 30, 500):
        widths = []
        for level in (0.5, 0.8, 0.9, 0.95, 0.99, 0.999):
            r = rates.poisson_rate(k, 7.5, confidence_level=level)
            assert r.low <= r.estimate <= r.high
            widths.append((r.low, r.high))
        for (lo1, hi1), (lo2, hi2) in zip(widths, widths[1:], strict=False):
            assert lo2 <= lo1 and hi2 > hi1


def test_test_at_each_limit_gives_alpha_over_two():
    # At the lower limit P(X >= k) = alpha/2; at the upper P(X <= k) = alpha/2 (exactness).
    for k in (1, 3, 12, 80):
        lim = rates.garwood_limits([k], 0.95)
        assert stats.poisson.sf(k - 1, lim.low[0]) == pytest.approx(0.025, abs=1e-9)
        assert stats.poisson.cdf(k, lim.high[0]) == pytest.approx(0.025, abs=1e-9)


def test_poisson_rates_vectorised_matches_scalar():
    frame = rates.poisson_rates([0, 4, 9], [2.0, 0.0, 3.0])
    assert list(frame["reason"]) == [None, rates.NO_MONITORED_TIME, None]
    assert frame.loc[2, "high"] == pytest.approx(rates.poisson_rate(9, 3.0).high)
    assert math.isnan(frame.loc[1, "estimate"])


# ---------------------------------------------------------------------------------------
# Two Poisson rates (checks.md section 4)


def test_rate_ratio_gu_example_two():
    # Gu, Ng, Tang & Schucany (2008) Biometrical Journal 50:283, Example 2: 41 in 28010 vs 15 in 19017.
    rr = rates.rate_ratio(41, 28010, 15, 19017)
    assert rr.estimate == pytest.approx(1.855759, abs=5e-7)  # derived
    assert rr.low == pytest.approx(1.005684, abs=5e-7)  # derived (beta quantiles)
    assert rr.high == pytest.approx(3.609300, abs=5e-7)  # derived
    # Published one-sided p-values for H0: R = 1.5 against R > 1.5 (flagged in checks.md: agree to
    # 3 decimals only, so compared at 0.0005).
    exact = rates.rate_ratio_test(41, 28010, 15, 19017, null_ratio=1.5, alternative="larger")
    midp = rates.rate_ratio_test(41, 28010, 15, 19017, null_ratio=1.5, alternative="larger", mid_p=True)
    assert exact.p_value == pytest.approx(0.2913, abs=PUB3)
    assert midp.p_value == pytest.approx(0.2450, abs=PUB3)
    assert exact.p_value == pytest.approx(0.291454, abs=5e-7)
    assert midp.p_value == pytest.approx(0.245174, abs=5e-7)


def test_rate_ratio_limits_invert_the_exact_conditional_test():
    # checks.md section 4: at each limit the one-sided statsmodels p-value is exactly 0.025.
    for xa, ta, xb, tb in [(41, 28010, 15, 19017), (3, 10.0, 9, 12.0), (1, 2.0, 20, 5.0)]:
        rr = rates.rate_ratio(xa, ta, xb, tb)
        p_hi = sm_rates.test_poisson_2indep(
            xa, ta, xb, tb, value=rr.high, method="exact-cond", alternative="smaller"
        )
        p_lo = sm_rates.test_poisson_2indep(
            xa, ta, xb, tb, value=rr.low, method="exact-cond", alternative="larger"
        )
        assert p_hi.pvalue == pytest.approx(0.025, abs=1e-7)
        assert p_lo.pvalue == pytest.approx(0.025, abs=1e-7)


@pytest.mark.parametrize("alternative", ["two-sided", "larger", "smaller"])
@pytest.mark.parametrize("mid_p", [False, True])
def test_rate_ratio_test_agrees_with_statsmodels(alternative, mid_p):
    method = "cond-midp" if mid_p else "exact-cond"
    for xa, ta, xb, tb in [(41, 28010, 15, 19017), (0, 3.0, 5, 4.0), (7, 1.5, 7, 1.5), (12, 30.0, 2, 8.0)]:
        for value in (0.5, 1.0, 1.5, 3.0):
            ours = rates.rate_ratio_test(
                xa, ta, xb, tb, null_ratio=value, alternative=alternative, mid_p=mid_p
            )
            ref = sm_rates.test_poisson_2indep(
                xa, ta, xb, tb, value=value, method=method, alternative=alternative
            )
            assert ours.p_value == pytest.approx(min(1.0, ref.pvalue), abs=1e-10)


def test_rate_ratio_edge_cases():
    none = rates.rate_ratio(0, 3.0, 0, 4.0)
    assert none.reason == rates.NO_EVENTS and none.low == 0.0 and none.high == math.inf
    only_a = rates.rate_ratio(4, 3.0, 0, 4.0)
    assert only_a.estimate == math.inf and only_a.high == math.inf and only_a.low > 0
    assert rates.rate_ratio(2, 0.0, 1, 1.0).reason == rates.NO_MONITORED_TIME


# ---------------------------------------------------------------------------------------
# Home bootstrap and overdispersion (checks.md section 9 properties)


def test_bootstrap_is_reproducible_with_a_seed():
    x, t = [0, 3, 1, 7, 2, 0, 5], [1.0, 2.0, 1.5, 2.5, 1.0, 0.8, 2.2]
    a = rates.home_bootstrap(x, t, rng=np.random.default_rng(7))
    b = rates.home_bootstrap(x, t, rng=np.random.default_rng(7))
    c = rates.home_bootstrap(x, t, rng=np.random.default_rng(8))
    assert (a.low, a.high) == (b.low, b.high)
    assert (a.low, a.high) != (c.low, c.high)
    assert a.estimate == pytest.approx(18 / 11.0)
    assert a.resamples == 2000 and a.homes == 7


@pytest.mark.parametrize("method", ["bca", "percentile"])
def test_bootstrap_collapses_when_homes_are_alike(method):
    b = rates.home_bootstrap([3] * 12, [2.0] * 12, rng=np.random.default_rng(1), method=method)
    assert b.low == pytest.approx(1.5, rel=1e-12) and b.high == pytest.approx(1.5, rel=1e-12)


def test_bootstrap_resamples_homes_not_events():
    # Same totals (20 events in 10 home-months); spread over ten homes alike, or all in one home.
    even = rates.home_bootstrap([2] * 10, [1.0] * 10, rng=np.random.default_rng(3), method="percentile")
    piled = rates.home_bootstrap(
        [20] + [0] * 9, [1.0] * 10, rng=np.random.default_rng(3), method="percentile"
    )
    assert even.high - even.low == pytest.approx(0.0, abs=1e-12)
    assert piled.high - piled.low > 2.0
    # A percentile draw is a total of drawn homes over their time: 0 or 20 events per drawn home.
    assert piled.low == pytest.approx(0.0, abs=1e-12) or piled.low >= 0


def test_bootstrap_percentile_matches_direct_resampling():
    x = np.array([0, 4, 1, 9, 2, 3, 0, 6])
    t = np.array([1.0, 2.0, 1.2, 3.0, 0.9, 1.5, 0.4, 2.6])
    ours = rates.home_bootstrap_limits(
        x, t, rng=np.random.default_rng(11), resamples=3000, method="percentile"
    )
    rng = np.random.default_rng(11)
    idx = rng.integers(0, len(x), size=(1, 3000, len(x)))[0]
    draws = x[idx].sum(axis=1) / t[idx].sum(axis=1)
    lo, hi = np.quantile(draws, [0.025, 0.975])
    assert ours.low[0] == pytest.approx(lo, rel=1e-12)
    assert ours.high[0] == pytest.approx(hi, rel=1e-12)


def test_bootstrap_drops_homes_without_time_and_needs_two():
    b = rates.home_bootstrap([1, 0], [2.0, 0.0], rng=np.random.default_rng(0))
    assert b.reason == rates.TOO_FEW_HOMES and b.homes == 1 and math.isnan(b.low)
    assert rates.home_bootstrap([], [], rng=np.random.default_rng(0)).reason == rates.NO_MONITORED_TIME
    with pytest.raises(ValueError):
        rates.home_bootstrap_limits([1, 2], [1.0, 0.0], rng=np.random.default_rng(0))


def test_overdispersion_by_hand():
    # Pooled rate 12 / 6 = 2; expected 2, 4, 6; X2 = (0-2)^2/2 + (2-4)^2/4 + (10-6)^2/6 = 2 + 1 + 8/3.
    d = rates.overdispersion([0, 2, 10], [1.0, 2.0, 3.0])
    assert d.statistic == pytest.approx(2 + 1 + 16 / 6)
    assert d.df == 2 and d.ratio == pytest.approx((3 + 16 / 6) / 2)
    assert d.p_value == pytest.approx(stats.chi2.sf(3 + 16 / 6, 2))
    alike = rates.overdispersion([2, 4, 6], [1.0, 2.0, 3.0])
    assert alike.statistic == pytest.approx(0.0) and alike.p_value == pytest.approx(1.0)
    assert rates.overdispersion([0, 0], [1.0, 1.0]).reason == rates.NO_EVENTS
    assert rates.overdispersion([3], [1.0]).reason == rates.TOO_FEW_HOMES


# ---------------------------------------------------------------------------------------
# Readiness


def test_readiness_states():
    met = rates.readiness(5, 25.0, 1.0)  # upper 0.4667 <= 1
    assert met.state == "met" and met.more_home_months == 0.0
    not_met = rates.readiness(30, 20.0, 1.0)  # lower > 1
    assert not_met.state == "not_met" and not_met.more_home_months is None
    at_target = rates.readiness(20, 20.0, 1.0)
    assert at_target.state == "not_yet_shown" and at_target.reason == rates.RATE_NOT_BELOW_TARGET
    nothing = rates.readiness(0, 0.0, 1.0)
    assert nothing.state == "not_yet_shown" and nothing.reason == rates.NO_MONITORED_TIME


def test_readiness_more_home_months_reaches_the_target():
    r = rates.readiness(14, 20.0, 1.0)
    assert r.state == "not_yet_shown" and r.high > 1.0 > r.low
    total = 20.0 + r.more_home_months
    # At the current rate 0.7 over `total` home-months, the exact upper limit equals the target.
    assert stats.chi2.ppf(0.975, 2 * 0.7 * total + 2) / 2 / total == pytest.approx(1.0, abs=1e-9)
    # With no false alarms yet, 3.689 home-months in all show a target of 1 (Garwood, k = 0).
    zero = rates.readiness(0, 1.0, 1.0)
    assert zero.more_home_months == pytest.approx(3.688879 - 1.0, abs=1e-6)


# ---------------------------------------------------------------------------------------
# Breakdowns


def test_rates_by_group_and_firmware_ratio():
    import pandas as pd

    counts = pd.DataFrame(
        {
            "firmware": ["2.1", "2.1", "2.2"],
            "false_alarms": [30, 11, 15],
            "home_months": [20000.0, 8010.0, 19017.0],
        }
    )
    table = breakdowns.rates_by(counts, "firmware")
    assert list(table["firmware"]) == ["2.1", "2.2"]
    assert table.loc[0, "false_alarms"] == 41 and table.loc[0, "home_months"] == pytest.approx(28010.0)
    assert table.loc[0, "high"] == pytest.approx(rates.poisson_rate(41, 28010.0).high)
    rr = breakdowns.firmware_ratio(table, "2.1", "2.2")
    # Gu et al. (2008) Example 2 again, through the breakdown table.
    assert rr.estimate == pytest.approx(1.855759, abs=5e-7)
    assert rr.low == pytest.approx(1.005684, abs=5e-7)


def test_heterogeneity_flags_sharp_differences_only():
    rng = np.random.default_rng(5)
    sharp = breakdowns.heterogeneity([40, 10, 12], [10.0, 10.0, 10.0], rng=rng)
    assert sharp.flagged and sharp.p_value < 0.01 and sharp.spread == pytest.approx(4.0)
    # Clear but small: a 30% difference in a very large pilot is significant, not sharp.
    mild = breakdowns.heterogeneity([1300, 1000], [100.0, 100.0], rng=rng)
    assert mild.p_value < 0.01 and not mild.flagged
    # A large spread on tiny counts is noise.
    noisy = breakdowns.heterogeneity([2, 0], [1.0, 1.0], rng=rng)
    assert noisy.p_value > 0.1 and not noisy.flagged
    assert breakdowns.heterogeneity([3], [1.0], rng=rng).reason == breakdowns.TOO_FEW_GROUPS


def test_heterogeneity_p_value_matches_the_exact_binomial_for_two_groups():
    # With two groups the conditional test is binomial; the statistic orders splits by distance
    # from the expected split, which for equal exposures is the two-sided binomial test.
    res = breakdowns.heterogeneity([14, 4], [1.0, 1.0], rng=np.random.default_rng(9), draws=200_000)
    exact = stats.binomtest(14, 18, 0.5).pvalue
    assert res.p_value == pytest.approx(exact, abs=0.002)


# ---------------------------------------------------------------------------------------
# The quick forms the weekly summary uses give the very same numbers


@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99])
@pytest.mark.parametrize("n", [1, 40, 65, 1000])
def test_garwood_limits_are_scipys_chi_square_quantiles_exactly(level, n):
    # Long arrays take each distinct count once; short ones are computed as they are.
    k = np.random.default_rng(n).poisson(30.0, n).astype(float)
    k[0] = 0.0
    lim = rates.garwood_limits(k, level)
    alpha = 1 - level
    low = np.where(k > 0, stats.chi2.ppf(alpha / 2, np.maximum(2 * k, 1e-300)) / 2, 0.0)
    assert np.array_equal(lim.low, low)
    assert np.array_equal(lim.high, stats.chi2.ppf(1 - alpha / 2, 2 * k + 2) / 2)


def test_rate_arrays_are_the_rates_frame():
    k, t = [0, 3, 7, 2], [2.5, 0.0, 1.25, 4.0]
    arrays = rates.poisson_rate_arrays(k, t)
    frame = rates.poisson_rates(k, t)
    for column, values in [("events", arrays.events), ("estimate", arrays.estimate), ("low", arrays.low)]:
        assert np.array_equal(frame[column].to_numpy(), values, equal_nan=True)
    assert (
        frame["reason"].tolist() == arrays.reasons().tolist() == [None, rates.NO_MONITORED_TIME, None, None]
    )


@pytest.mark.parametrize("seed", range(6))
def test_sort_order_is_the_order_of_sort_values(seed):
    rng = np.random.default_rng(seed)
    n = 60
    x = rng.integers(0, 4, n).astype(float)
    x[rng.random(n) < 0.15] = np.nan
    frame = pd.DataFrame(
        {
            "count": rng.integers(0, 3, n),
            "rate": x,
            "code": pd.Series(rng.choice(["H-07", "H-02", "H-11", None], n), dtype="str"),
            "sorted_code": pd.Series(sorted(rng.choice(["A", "B", "C"], n)), dtype="str"),
            "flag": rng.random(n) < 0.5,
        }
    )
    for keys in (
        ["count", "rate", "code"],
        ["rate", "code"],
        ["code", "count"],
        ["sorted_code", "rate"],
        ["rate", "sorted_code"],
        ["flag", "rate", "count"],
    ):
        for ascending in ([True] * len(keys), [False] * len(keys), [i % 2 == 0 for i in range(len(keys))]):
            expected = frame.sort_values(
                keys, ascending=ascending, kind="mergesort", na_position="last"
            ).index
            got = rates.sort_order([frame[k] for k in keys], ascending)
            assert got.tolist() == expected.tolist(), (keys, ascending)


def test_bootstrap_of_many_pilots_draws_as_fancy_indexing(monkeypatch):
    # Several pilots in small chunks: every chunk's draws must use the generator exactly as before.
    monkeypatch.setattr(rates, "_CHUNK_ELEMENTS", 3 * 50 * 9)
    rng = np.random.default_rng(5)
    x = rng.poisson(2.0, (7, 9)).astype(float)
    t = rng.uniform(0.2, 3.0, (7, 9))
    ours = rates.home_bootstrap_limits(x, t, rng=np.random.default_rng(21), resamples=50, method="percentile")
    gen = np.random.default_rng(21)
    for start in range(0, 7, 3):
        xs, ts = x[start : start + 3], t[start : start + 3]
        idx = gen.integers(0, 9, size=(len(xs), 50, 9))
        rows = np.arange(len(xs))[:, None, None]
        draws = np.sort(xs[rows, idx].sum(axis=2) / ts[rows, idx].sum(axis=2), axis=1)
        alpha = 1 - 0.95
        for level, limit in ((alpha / 2, ours.low), (1 - alpha / 2, ours.high)):
            expected = rates._row_quantiles(draws, np.full(len(xs), level))
            assert np.array_equal(limit[start : start + 3], expected)


def test_heterogeneity_counts_draws_as_written():
    x, t = np.array([30.0, 12.0, 25.0]), np.array([10.0, 8.0, 7.0])
    ours = breakdowns.heterogeneity(x, t, rng=np.random.default_rng(4), draws=5000)
    p = t / t.sum()
    expected = x.sum() * p
    observed = float(((x - expected) ** 2 / expected).sum())
    sims = np.random.default_rng(4).multinomial(int(x.sum()), p, size=5000)
    hits = int((((sims - expected) ** 2 / expected).sum(axis=1) >= observed * (1 - 1e-9)).sum())
    assert ours.p_value == (1 + hits) / 5001 and ours.statistic == observed
