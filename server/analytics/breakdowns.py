"""False-alarm rates by firmware version, hardware model and room, and whether they differ sharply.

Pure functions over DataFrames; the Monte Carlo test takes its `numpy.random.Generator`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from server.analytics import rates

TOO_FEW_GROUPS = "fewer_than_two_groups"
# "Sharply": the exact conditional test says the rates differ (p < 0.01) AND the highest group
# rate is at least twice the lowest. The test alone would flag small differences in a large
# pilot; the spread alone would flag noise in a small one.
SHARP_P = 0.01
SHARP_SPREAD = 2.0


@dataclass(frozen=True)
class Heterogeneity:
    """Do the groups share one false-alarm rate?

    statistic: Pearson chi-square of group counts against the pooled rate; p_value: its
    Monte Carlo exact conditional p-value; spread: highest / lowest group rate (inf when the
    lowest is 0); flagged: p_value < 0.01 and spread >= 2.
    """

    groups: int
    statistic: float
    df: int
    p_value: float
    draws: int
    spread: float
    flagged: bool
    method: str
    reason: str | None = None


def rates_by(counts: pd.DataFrame, key: str, *, confidence_level: float = 0.95) -> pd.DataFrame:
    """Rate and exact interval per group.

    counts: <key>, false_alarms, home_months (rows of one group are summed).
    Returns <key>, false_alarms, home_months, rate, low, high, reason, by most monitored time.
    """
    g = counts.groupby(key, as_index=False, dropna=False)[["false_alarms", "home_months"]].sum()
    return rates_table(
        key,
        pd.Index(g[key]),
        g["false_alarms"].to_numpy(),
        g["home_months"].to_numpy(),
        confidence_level=confidence_level,
    )


def rates_table(
    key: str,
    groups: pd.Index,
    false_alarms: ArrayLike,
    home_months: ArrayLike,
    *,
    confidence_level: float = 0.95,
) -> pd.DataFrame:
    """`rates_by` for counts already summed: group values, and false alarms and home-months per group."""
    fa, hm = np.asarray(false_alarms), np.asarray(home_months)
    order = rates.sort_order([hm, groups], [False, True])
    r = rates.poisson_rate_arrays(fa[order], hm[order].astype(np.float64), confidence_level=confidence_level)
    return pd.DataFrame(
        {
            key: groups.take(order),
            "false_alarms": r.events,
            "home_months": hm[order],
            "rate": r.estimate,
            "low": r.low,
            "high": r.high,
            "reason": r.reasons(),
        }
    )


def heterogeneity(
    false_alarms: ArrayLike, home_months: ArrayLike, *, rng: np.random.Generator, draws: int = 20000
) -> Heterogeneity:
    """Exact conditional test that every group has the same Poisson rate.

    Given the total N, the group counts are multinomial with probabilities t_i / T under equal
    rates. The p-value is the share of `draws` multinomial samples whose Pearson chi-square is at
    least the observed one, counted as (1 + hits) / (1 + draws) so it is never 0. Groups without
    monitored time are left out.

    References: Hope ACA (1968) A simplified Monte Carlo significance test procedure. JRSS B
    30:582-598 (from memory); the same procedure as R's chisq.test(simulate.p.value = TRUE).
    """
    x = np.asarray(false_alarms, dtype=np.float64)
    t = np.asarray(home_months, dtype=np.float64)
    keep = t > 0
    x, t = x[keep], t[keep]
    k = len(t)
    method = "monte-carlo exact conditional chi-square"
    if k < 2 or x.sum() == 0:
        return Heterogeneity(
            groups=k,
            statistic=math.nan,
            df=max(k - 1, 0),
            p_value=math.nan,
            draws=0,
            spread=math.nan,
            flagged=False,
            method=method,
            reason=TOO_FEW_GROUPS if k < 2 else rates.NO_EVENTS,
        )
    n = int(x.sum())
    p = t / t.sum()
    expected = n * p
    observed = float(((x - expected) ** 2 / expected).sum())
    # (sims - expected) ** 2 / expected, summed per draw, in one buffer.
    sim = rng.multinomial(n, p, size=draws) - expected
    np.square(sim, out=sim)
    np.divide(sim, expected, out=sim)
    sim_stats = sim.sum(axis=1)
    # A relative slack so that ties with the observed statistic count despite rounding.
    hits = int((sim_stats >= observed * (1 - 1e-9)).sum())
    p_value = (1 + hits) / (1 + draws)
    r = x / t
    spread = math.inf if r.min() == 0 else float(r.max() / r.min())
    return Heterogeneity(
        groups=k,
        statistic=observed,
        df=k - 1,
        p_value=p_value,
        draws=draws,
        spread=spread,
        flagged=bool(p_value < SHARP_P and spread >= SHARP_SPREAD),
        method=method,
    )


def firmware_ratio(
    table: pd.DataFrame,
    version_a: str,
    version_b: str,
    *,
    key: str = "firmware",
    confidence_level: float = 0.95,
) -> rates.RatioEstimate:
    """Rate ratio (a over b) of two firmware versions from a `rates_by` table, exact conditional.

    A version missing from the table counts as no events in no monitored time.
    """

    def pick(v: str) -> tuple[int, float]:
        rows = (table[key] == v).to_numpy(dtype=bool)
        return (
            int(table["false_alarms"].to_numpy()[rows].sum()),
            float(table["home_months"].to_numpy()[rows].sum()),
        )

    (xa, ta), (xb, tb) = pick(version_a), pick(version_b)
    return rates.rate_ratio(xa, ta, xb, tb, confidence_level=confidence_level)
