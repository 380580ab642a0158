"""Group comparisons that let homes differ: score tests between homes, conditional Poisson within."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats import rates as sm_rates

from server.analytics import compare


def _rows(home, group, x, t, key="firmware"):
    return pd.DataFrame({"home_code": home, key: group, "false_alarms": x, "home_months": t})


def test_score_statistic_with_homes_alike_is_the_poisson_score_test():
    # Every home identical, so the clustered variance is below the Poisson one and the floor rules:
    # the statistic is the score test of two Poisson rates; statsmodels test_poisson_2indep(15, 5,
    # 5, 5, method="score") gives z = 2.236068 (= sqrt(5)).
    homes = [f"H{i}" for i in range(10)]
    rows = _rows(homes, ["a"] * 5 + ["b"] * 5, [3] * 5 + [1] * 5, [1.0] * 10)
    sm_z = sm_rates.test_poisson_2indep(15, 5, 5, 5, method="score").statistic
    assert sm_z == pytest.approx(math.sqrt(5))
    c = compare.compare_groups(rows, key="firmware", reference="b")
    row = c.table.set_index("group").loc["a"]
    # Same statistic, referred to t on homes - 1 = 9 df (the small-cluster reference).
    assert row["p_value"] == pytest.approx(2 * stats.t.sf(sm_z, 9))
    assert row["ratio"] == pytest.approx(3.0)
    # Two groups: the joint F statistic is the square of the pair's t.
    assert c.statistic == pytest.approx(sm_z**2) and c.df_num == 1 and c.df_den == 9


def test_p_value_and_interval_agree_and_limits_sit_at_the_quantile():
    rng = np.random.default_rng(5)
    disagree = 0
    for _ in range(60):
        g = 12
        home = np.repeat([f"H{i}" for i in range(g)], 2)
        grp = np.tile(["a", "b"], g)
        grp = np.where(rng.random(2 * g) < 0.5, "a", "b")
        t = rng.uniform(0.5, 2.0, 2 * g)
        x = rng.poisson(rng.gamma(0.7, 2.0 / 0.7, g).repeat(2) * t)
        c = compare.compare_groups(_rows(home, grp, x, t), key="firmware", reference="b")
        row = c.table.set_index("group").loc["a"]
        if not math.isfinite(row["p_value"]) or row["reason"] is not None:
            continue
        excludes = row["low"] > 1 or row["high"] < 1
        disagree += excludes != (row["p_value"] < 0.05)
    assert disagree == 0


def test_interval_limits_are_where_the_test_just_rejects():
    rng = np.random.default_rng(11)
    g = 15
    xa, ta = rng.poisson(2.0, g).astype(float), rng.uniform(1, 2, g)
    xb, tb = rng.poisson(1.0, g).astype(float), rng.uniform(1, 2, g)
    q = stats.t.ppf(0.975, 2 * g - 1)
    zeros = np.zeros(g)
    xa2, ta2 = np.concatenate([xa, zeros]), np.concatenate([ta, zeros])
    xb2, tb2 = np.concatenate([zeros, xb]), np.concatenate([zeros, tb])
    est, low, high, p = compare._pair_test(xa2, ta2, xb2, tb2, 2 * g - 1, 0.95)
    assert low < est < high
    assert compare._pair_t(xa2, ta2, xb2, tb2, math.log(low))[0] == pytest.approx(q, abs=1e-6)
    assert compare._pair_t(xa2, ta2, xb2, tb2, math.log(high))[0] == pytest.approx(-q, abs=1e-6)


def test_within_homes_matches_statsmodels_fixed_effects_with_clustered_errors():
    # Reference: statsmodels GLM(Poisson) with one dummy per home, log time as offset,
    # cov_type="cluster" by home. statsmodels scales by G/(G-1) (N-1)/(N-K); ours by G/(G-1), so
    # its variance is multiplied by (N-K)/(N-1) before comparing.
    rng = np.random.default_rng(3)
    g = 14
    home = np.repeat(np.arange(g), 2)
    grp = np.tile(["1.0", "1.1"], g)
    t = rng.uniform(0.3, 1.5, 2 * g)
    lam = rng.gamma(0.8, 2.0 / 0.8, g).repeat(2) * np.where(grp == "1.1", 1.3, 1.0)
    x = rng.poisson(lam * t)
    x[0:2] = [6, 1]  # spread the homes' changes so the clustered variance exceeds the Poisson floor
    rows = _rows([f"H{i}" for i in home], grp, x, t)
    res = compare.compare_pair(rows, "1.1", "1.0")
    assert res.within_homes
    keep = pd.Series(x).groupby(home).transform("sum").to_numpy() > 0
    dummies = pd.get_dummies(home[keep]).to_numpy(dtype=float)
    exog = np.column_stack([(grp[keep] == "1.1").astype(float), dummies])
    fit = sm.GLM(x[keep], exog, family=sm.families.Poisson(), offset=np.log(t[keep])).fit(
        cov_type="cluster", cov_kwds={"groups": home[keep]}
    )
    n, k = int(keep.sum()), exog.shape[1]
    se = math.sqrt(fit.cov_params()[0, 0] * (n - k) / (n - 1))
    assert res.estimate == pytest.approx(math.exp(fit.params[0]), rel=1e-6)
    q = stats.t.ppf(0.975, res.homes - 1)
    assert res.low == pytest.approx(math.exp(fit.params[0] - q * se), rel=1e-5)
    assert res.high == pytest.approx(math.exp(fit.params[0] + q * se), rel=1e-5)
    assert res.p_value == pytest.approx(2 * stats.t.sf(abs(fit.params[0]) / se, res.homes - 1), rel=1e-5)


def test_differences_between_homes_cancel_within_homes():
    # Ten homes with very different rates; every home's rate doubles with the new version.
    homes = [f"H{i}" for i in range(10)]
    base = np.array([0.2, 0.5, 1, 2, 4, 8, 0.3, 0.6, 3, 6]) * 10
    rows = _rows(homes * 2, ["1.0"] * 10 + ["1.1"] * 10, np.concatenate([base, 2 * base]), [1.0] * 20)
    res = compare.compare_pair(rows, "1.1", "1.0")
    assert res.within_homes and res.paired_homes == 10
    assert res.estimate == pytest.approx(2.0)
    assert res.differs and res.low > 1


def test_few_homes_and_empty_groups_give_reasons():
    rows = _rows(["H1", "H2", "H3"], ["a", "b", "a"], [1, 2, 3], [1.0, 1.0, 1.0])
    c = compare.compare_groups(rows, key="firmware")
    assert c.reason == compare.TOO_FEW_HOMES and not c.differs
    one = compare.compare_groups(rows[rows["firmware"] == "a"], key="firmware")
    assert one.reason == compare.TOO_FEW_GROUPS
    homes = [f"H{i}" for i in range(8)]
    none = _rows(homes, ["a", "b"] * 4, [0] * 8, [1.0] * 8)
    assert compare.compare_groups(none, key="firmware").reason == compare.NO_EVENTS_IN_GROUP
    zero_a = _rows(homes, ["a", "b"] * 4, [0, 3, 0, 4, 0, 2, 0, 5], [1.0] * 8)
    row = compare.compare_groups(zero_a, key="firmware", reference="b").table.set_index("group").loc["a"]
    assert row["ratio"] == 0.0 and row["low"] == 0.0 and 0 < row["high"] < 1


def test_three_groups_joint_test_and_table():
    rng = np.random.default_rng(8)
    g = 30
    home = np.repeat([f"H{i}" for i in range(g)], 3)
    room = np.tile(["kitchen", "hallway", "bedroom"], g)
    t = rng.uniform(0.5, 1.5, 3 * g)
    mult = np.select([room == "kitchen", room == "hallway"], [4.0, 1.0], 1.0)
    x = rng.poisson(rng.gamma(2.0, 0.5, g).repeat(3) * mult * t)
    c = compare.compare_groups(_rows(home, room, x, t, key="room"), key="room", reference="hallway")
    assert c.groups == 3 and c.df_num == 2 and c.df_den == g - 1
    assert c.differs and c.p_value < 0.01
    kitchen = c.table.set_index("group").loc["kitchen"]
    assert kitchen["differs"] and kitchen["low"] > 1.5
    assert set(c.table.columns) >= {"group", "homes", "false_alarms", "home_months", "rate", "ratio", "low"}
