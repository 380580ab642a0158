"""Which homes, causes and resemblance grades the false alarms come from.

Pure functions over DataFrames; no database access.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from server.analytics import rates

NO_FALSE_ALARMS = "no_false_alarms"


@dataclass(frozen=True)
class Concentration:
    """How far false alarms pile up in a few homes.

    `gini` is the small-sample form (see `gini`); `rate_without_top` is the rate with the top
    home's false alarms and monitored time both left out.
    """

    homes: int
    false_alarms: int
    top_home: str | None
    top_home_share: float
    rate_without_top: rates.RateEstimate
    gini: float
    reason: str | None = None


@dataclass(frozen=True)
class HomesAboveTarget:
    """Homes whose rate is above the target: by point estimate, and clearly (whole interval above)."""

    homes: int
    target: float
    above: int
    clearly_above: int
    share_above: float
    share_clearly_above: float
    clearly_above_codes: tuple[str, ...]


def gini(counts: ArrayLike) -> float:
    """Gini coefficient of counts over homes, small-sample form.

    G = sum_i sum_j |x_i - x_j| / (2 n (n - 1) mean), which is the population form
    sum |x_i - x_j| / (2 n^2 mean) times n / (n - 1). We show this form because it runs from 0
    (every home alike) to exactly 1 (every false alarm in one home) whatever the number of homes,
    so weeks with different numbers of homes compare. Undefined (NaN) with fewer than two homes
    or when every count is zero: with no false alarms there is nothing to concentrate.

    References: common practice (Gini mean difference); the closed forms for 0,...,0,10 and
    1..5 are worked in the test suite.
    """
    x = np.sort(np.asarray(counts, dtype=np.float64))
    n = len(x)
    if n < 2 or x.sum() <= 0:
        return math.nan
    # sum_i sum_j |x_i - x_j| = 2 sum_i (2i - n - 1) x_(i) over the sorted values, i = 1..n.
    i = np.arange(1, n + 1)
    mean_difference_sum = 2.0 * float(((2 * i - n - 1) * x).sum())
    return mean_difference_sum / (2.0 * n * (n - 1) * float(x.mean()))


def home_pareto(homes: pd.DataFrame, *, confidence_level: float = 0.95) -> pd.DataFrame:
    """Pareto table over homes.

    Parameters
    ----------
    homes: one row per home with columns home_code (str), false_alarms (int) and home_months
        (float); homes with no false alarms belong in it too.

    Returns
    -------
    Columns home_code, false_alarms, home_months, rate, low, high (exact interval per home),
    share, cumulative_share; sorted by false alarms (most first), then rate, then home code.
    Shares are NaN when there are no false alarms at all.
    """
    codes = homes["home_code"].reset_index(drop=True)
    fa = homes["false_alarms"].astype(np.int64).to_numpy()
    hm = homes["home_months"].astype(np.float64).to_numpy()
    r = rates.poisson_rate_arrays(fa, hm, confidence_level=confidence_level)
    order = rates.sort_order([fa, r.estimate, codes], [False, False, True])
    fa = fa[order]
    total = int(fa.sum())
    nan = np.full(len(fa), np.nan)
    return pd.DataFrame(
        {
            "home_code": codes.take(order).reset_index(drop=True),
            "false_alarms": fa,
            "home_months": hm[order],
            "rate": r.estimate[order],
            "low": r.low[order],
            "high": r.high[order],
            "share": fa / total if total > 0 else nan,
            "cumulative_share": np.cumsum(fa) / total if total > 0 else nan,
        }
    )


def concentration(homes: pd.DataFrame, *, confidence_level: float = 0.95) -> Concentration:
    """Top-home share, rate without the top home and the Gini coefficient over homes.

    The top home is the first row of `home_pareto` (most false alarms; ties go to the higher rate,
    then the lower code). With no false alarms the shares and Gini are NaN with reason
    "no_false_alarms" and there is no top home.
    """
    return pareto_concentration(
        home_pareto(homes, confidence_level=confidence_level), confidence_level=confidence_level
    )


def pareto_concentration(table: pd.DataFrame, *, confidence_level: float = 0.95) -> Concentration:
    """`concentration` from the `home_pareto` table of the same homes, when it is already built."""
    total = int(table["false_alarms"].sum())
    total_t = float(table["home_months"].sum())
    if total == 0 or table.empty:
        return Concentration(
            homes=len(table),
            false_alarms=total,
            top_home=None,
            top_home_share=math.nan,
            rate_without_top=rates.poisson_rate(0, total_t, confidence_level=confidence_level),
            gini=math.nan,
            reason=NO_FALSE_ALARMS,
        )
    top = table.iloc[0]
    return Concentration(
        homes=len(table),
        false_alarms=total,
        top_home=str(top.home_code),
        top_home_share=float(top.false_alarms) / total,
        rate_without_top=rates.poisson_rate(
            total - int(top.false_alarms), total_t - float(top.home_months), confidence_level=confidence_level
        ),
        gini=gini(table["false_alarms"].to_numpy()),
    )


def category_shares(
    counts: pd.DataFrame, home_months: float, *, category: str, confidence_level: float = 0.95
) -> pd.DataFrame:
    """False alarms by a category (cause or resemblance grade): share and rate per home-month.

    Parameters
    ----------
    counts: columns <category> and false_alarms; several rows per category are summed.
    home_months: the monitored time all categories share (the rate's denominator).

    Returns
    -------
    Columns <category>, false_alarms, share, cumulative_share, rate, low, high; most first.
    """
    # One group per value, a missing value included (a groupby with dropna=False).
    codes, values = pd.factorize(counts[category], use_na_sentinel=False)
    weights = counts["false_alarms"].to_numpy(dtype=np.float64)
    fa = np.bincount(codes, weights=weights, minlength=len(values)).astype(np.int64)
    order = rates.sort_order([fa, values], [False, True])
    fa = fa[order]
    total = int(fa.sum())
    r = rates.poisson_rate_arrays(fa, np.full(len(fa), home_months), confidence_level=confidence_level)
    nan = np.full(len(fa), np.nan)
    return pd.DataFrame(
        {
            category: values.take(order),
            "false_alarms": fa,
            "share": fa / total if total else nan,
            "cumulative_share": np.cumsum(fa) / total if total else nan,
            "rate": r.estimate,
            "low": r.low,
            "high": r.high,
        }
    )


def homes_above_target(pareto: pd.DataFrame, target: float) -> HomesAboveTarget:
    """Homes above the target rate, from a `home_pareto` table.

    "Above" compares the home's point estimate; "clearly above" needs the whole exact interval
    above the target (lower limit > target). Homes without monitored time are not counted.
    """
    monitored = pareto["home_months"].to_numpy() > 0
    n = int(monitored.sum())
    above = int((monitored & (pareto["rate"].to_numpy() > target)).sum())
    clearly = monitored & (pareto["low"].to_numpy() > target)
    n_clearly = int(clearly.sum())
    return HomesAboveTarget(
        homes=n,
        target=target,
        above=above,
        clearly_above=n_clearly,
        share_above=above / n if n else math.nan,
        share_clearly_above=n_clearly / n if n else math.nan,
        clearly_above_codes=tuple(str(c) for c in pareto["home_code"][clearly]),
    )
