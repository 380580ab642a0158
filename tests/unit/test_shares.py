"""Concentration of false alarms across homes, causes and resemblance grades."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from server.analytics import rates, shares


def _population_gini(x):
    x = np.asarray(x, dtype=float)
    return np.abs(x[:, None] - x[None, :]).sum() / (2 * len(x) ** 2 * x.mean())


def _lorenz_gini(x):
    # Population Gini as 1 - 2 * (area under the Lorenz curve), by trapezoids.
    x = np.sort(np.asarray(x, dtype=float))
    cum = np.concatenate([[0.0], np.cumsum(x) / x.sum()])
    area = ((cum[1:] + cum[:-1]) / 2).sum() / len(x)
    return 1 - 2 * area


@pytest.mark.parametrize(
    ("counts", "population", "small_sample", "top_share"),
    [
        # checks.md section 8: closed forms of the Gini mean-difference definition (common practice).
        ([0] * 9 + [10], 0.9, 1.0, 1.0),
        ([1, 2, 3, 4, 5], 4 / 15, 1 / 3, 1 / 3),
    ],
)
def test_gini_closed_forms(counts, population, small_sample, top_share):
    n = len(counts)
    assert shares.gini(counts) == pytest.approx(small_sample, abs=1e-12)
    # The population form is the shown form times (n - 1) / n; checked two ways.
    assert shares.gini(counts) * (n - 1) / n == pytest.approx(population, abs=1e-12)
    assert _population_gini(counts) == pytest.approx(population, abs=1e-12)
    assert _lorenz_gini(counts) == pytest.approx(population, abs=1e-12)
    homes = pd.DataFrame(
        {"home_code": [f"H-{i:04d}" for i in range(n)], "false_alarms": counts, "home_months": [1.0] * n}
    )
    assert shares.concentration(homes).top_home_share == pytest.approx(top_share)


def test_gini_agrees_with_mean_difference_on_random_counts():
    rng = np.random.default_rng(4)
    for _ in range(20):
        x = rng.poisson(rng.gamma(0.5, 4.0, size=37))
        if x.sum() == 0:
            continue
        assert shares.gini(x) == pytest.approx(_population_gini(x) * 37 / 36, rel=1e-12)


def test_gini_undefined_without_false_alarms_or_with_one_home():
    assert math.isnan(shares.gini([0, 0, 0]))
    assert math.isnan(shares.gini([4]))
    homes = pd.DataFrame(
        {"home_code": ["H-0001", "H-0002"], "false_alarms": [0, 0], "home_months": [1.0, 2.0]}
    )
    c = shares.concentration(homes)
    assert c.reason == shares.NO_FALSE_ALARMS and c.top_home is None and math.isnan(c.gini)
    assert c.rate_without_top.high == pytest.approx(3.688879 / 3.0, abs=1e-6)


def test_pareto_table_orders_and_accumulates():
    homes = pd.DataFrame(
        {
            "home_code": ["H-0003", "H-0001", "H-0002", "H-0004"],
            "false_alarms": [2, 6, 2, 0],
            "home_months": [1.0, 2.0, 0.5, 1.5],
        }
    )
    table = shares.home_pareto(homes)
    # Ties on false alarms go to the higher rate (H-0002: 4 per home-month before H-0003: 2).
    assert list(table["home_code"]) == ["H-0001", "H-0002", "H-0003", "H-0004"]
    assert list(table["share"]) == pytest.approx([0.6, 0.2, 0.2, 0.0])
    assert list(table["cumulative_share"]) == pytest.approx([0.6, 0.8, 1.0, 1.0])
    assert table.loc[0, "rate"] == pytest.approx(3.0)
    assert table.loc[3, "low"] == 0.0
    assert table.loc[3, "high"] == pytest.approx(3.688879 / 1.5, abs=1e-6)


def test_concentration_rate_without_the_top_home():
    homes = pd.DataFrame(
        {
            "home_code": ["H-0001", "H-0002", "H-0003"],
            "false_alarms": [10, 3, 2],
            "home_months": [1.0, 3.0, 2.0],
        }
    )
    c = shares.concentration(homes)
    assert c.top_home == "H-0001" and c.top_home_share == pytest.approx(10 / 15)
    expected = rates.poisson_rate(5, 5.0)
    assert c.rate_without_top == expected


def test_category_shares_by_cause_and_resemblance():
    counts = pd.DataFrame({"cause": ["dog", "speech", "dog", None], "false_alarms": [3, 4, 2, 1]})
    table = shares.category_shares(counts, 10.0, category="cause")
    assert list(table["cause"])[:2] == ["dog", "speech"]
    assert table["false_alarms"].tolist() == [5, 4, 1]
    assert table["share"].tolist() == pytest.approx([0.5, 0.4, 0.1])
    assert table["cumulative_share"].iloc[-1] == pytest.approx(1.0)
    assert table.loc[0, "high"] == pytest.approx(rates.poisson_rate(5, 10.0).high)
    grades = pd.DataFrame({"resemblance": ["forgivable", "unforgivable"], "false_alarms": [0, 0]})
    empty = shares.category_shares(grades, 2.0, category="resemblance")
    assert empty["share"].isna().all() and (empty["low"] == 0).all()


def test_homes_above_target_counts_clearly_above_only_when_interval_is_above():
    homes = pd.DataFrame(
        {
            "home_code": ["H-0001", "H-0002", "H-0003", "H-0004"],
            # 12 in 2 home-months: lower limit 3.1 > 1 (clearly above); 2 in 1: above but not clearly;
            # 0 in 3: below; no monitored time: not counted.
            "false_alarms": [12, 2, 0, 1],
            "home_months": [2.0, 1.0, 3.0, 0.0],
        }
    )
    res = shares.homes_above_target(shares.home_pareto(homes), 1.0)
    assert (res.homes, res.above, res.clearly_above) == (3, 2, 1)
    assert res.clearly_above_codes == ("H-0001",)
    assert res.share_clearly_above == pytest.approx(1 / 3)


@pytest.mark.parametrize("seed", range(4))
def test_pareto_and_category_tables_are_the_sorted_frames(seed):
    # The tables are built from arrays; they must equal sorting the frame itself, ties included.
    rng = np.random.default_rng(seed)
    n = 50
    homes = pd.DataFrame(
        {
            "home_code": [f"H-{i:04d}" for i in rng.permutation(n)],
            "false_alarms": rng.integers(0, 4, n),
            "home_months": rng.choice([0.0, 0.5, 1.0, 2.0], n),
        }
    )
    r = rates.poisson_rates(homes["false_alarms"], homes["home_months"])
    expected = homes.assign(rate=r["estimate"].to_numpy(), low=r["low"].to_numpy(), high=r["high"].to_numpy())
    expected = expected.sort_values(
        ["false_alarms", "rate", "home_code"], ascending=[False, False, True], kind="mergesort"
    ).reset_index(drop=True)
    total = expected["false_alarms"].sum()
    expected["share"] = expected["false_alarms"] / total
    expected["cumulative_share"] = expected["false_alarms"].cumsum() / total
    pd.testing.assert_frame_equal(shares.home_pareto(homes), expected)

    counts = pd.DataFrame(
        {
            "cause": rng.choice(["dog", "speech", "kettle", "unknown"], 12),
            "false_alarms": rng.integers(0, 3, 12),
        }
    )
    grouped = counts.groupby("cause", sort=False)["false_alarms"].sum().reset_index()
    grouped = grouped.sort_values(["false_alarms", "cause"], ascending=[False, True], kind="mergesort")
    table = shares.category_shares(counts, 7.5, category="cause")
    assert table["cause"].tolist() == grouped["cause"].tolist()
    assert table["false_alarms"].tolist() == grouped["false_alarms"].tolist()
    assert np.array_equal(
        table["high"], rates.poisson_rates(grouped["false_alarms"], [7.5] * len(grouped))["high"]
    )
