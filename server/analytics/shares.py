"""Which homes, causes and resemblance grades the false alarms come from.

Pure functions over DataFrames; no database access.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy import stats

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


# ---------------------------------------------------------------------------------------
# Against monitored time and against chance; many homes tested at once

MULTIPLICITY_METHODS = ("holm", "bh")
MULTIPLICITY_TEXT = {
    "holm": "Holm's step-down correction (the chance of naming any home wrongly is kept below {alpha:.0%})",
    "bh": "Benjamini-Hochberg correction (wrongly named homes are kept below {alpha:.0%} of those named)",
}


def adjust_p(p_values: ArrayLike, method: str = "holm") -> np.ndarray:
    """Multiplicity-adjusted p-values (same order as given; NaN stays NaN and is not counted).

    "holm": Holm S (1979) A simple sequentially rejective multiple test procedure. Scand J Stat
    6:65-70. "bh": Benjamini Y, Hochberg Y (1995) JRSS B 57:289-300 (both from memory). Agree with
    statsmodels `multipletests(method="holm" | "fdr_bh")`.
    """
    if method not in MULTIPLICITY_METHODS:
        raise ValueError(f"unknown method {method!r}; expected one of {MULTIPLICITY_METHODS}")
    p = np.asarray(p_values, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    q = p[ok]
    m = len(q)
    if m == 0:
        return out
    order = np.argsort(q, kind="mergesort")
    s = q[order]
    if method == "holm":
        adj = np.maximum.accumulate((m - np.arange(m)) * s)
    else:
        adj = np.minimum.accumulate(m / np.arange(m, 0, -1) * s[::-1])[::-1]
    adj = np.minimum(adj, 1.0)
    res = np.empty(m)
    res[order] = adj
    out[ok] = res
    return out


@dataclass(frozen=True)
class HomesAboveTargetAdjusted:
    """Homes shown above the target by a one-sided exact test each, corrected for testing many.

    `table`: home_code, false_alarms, home_months, rate, p_value (P(X >= k) at the target),
    p_adjusted, clearly_above; sorted by p-value. `method_text` is the sentence the page shows.
    """

    homes: int
    target: float
    alpha: float
    method: str
    method_text: str
    above: int
    clearly_above: int
    clearly_above_codes: tuple[str, ...]
    table: pd.DataFrame


def homes_above_target_adjusted(
    homes: pd.DataFrame, target: float, *, alpha: float = 0.05, method: str = "holm"
) -> HomesAboveTargetAdjusted:
    """Which homes are clearly above the target rate, with the multiplicity of homes allowed for.

    Per home the one-sided exact Poisson p-value of rate > target, p = P(X >= k | mu = target T),
    then `adjust_p` across homes with monitored time; a home is "clearly above" when its adjusted
    p-value is below `alpha`. `above` counts homes whose point estimate is above the target.
    """
    if not target > 0:
        raise ValueError("the target must be positive")
    if not 0 < alpha < 1:
        raise ValueError("alpha must be between 0 and 1")
    codes = homes["home_code"].astype(str).to_numpy()
    k = homes["false_alarms"].to_numpy(dtype=np.float64)
    t = homes["home_months"].to_numpy(dtype=np.float64)
    mon = t > 0
    p = np.where(mon, stats.poisson.sf(k - 1, target * np.where(mon, t, 0.0)), np.nan)
    p = np.where(mon & (k == 0), 1.0, p)
    adj = adjust_p(p, method)
    clearly = mon & (adj < alpha)
    rate = np.divide(k, t, out=np.full(len(t), np.nan), where=mon)
    table = pd.DataFrame(
        {
            "home_code": codes,
            "false_alarms": k.astype(np.int64),
            "home_months": t,
            "rate": rate,
            "p_value": p,
            "p_adjusted": adj,
            "clearly_above": clearly,
        }
    )
    table = table.iloc[rates.sort_order([table["p_value"], table["home_code"]], [True, True])].reset_index(
        drop=True
    )
    return HomesAboveTargetAdjusted(
        homes=int(mon.sum()),
        target=target,
        alpha=alpha,
        method=method,
        method_text=MULTIPLICITY_TEXT[method].format(alpha=alpha),
        above=int((mon & (rate > target)).sum()),
        clearly_above=int(clearly.sum()),
        clearly_above_codes=tuple(table["home_code"][table["clearly_above"]]),
        table=table,
    )


def binom_test_two_sided(k: ArrayLike, n: int, p: ArrayLike) -> np.ndarray:
    """Two-sided exact binomial p-values of k successes in n trials at probabilities p, one per element.

    The same test, step for step, as scipy's `binomtest(k, n, p).pvalue` (the other tail holds the
    outcomes no more likely than k, with scipy's relative slack of 1e-7, found by the same binary
    search over the pmf), run on all elements at once so that many homes cost one call per step.
    The unit tests check it against scipy element by element.
    """
    k = np.asarray(k, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    d = stats.binom.pmf(k, n, p)
    rerr = 1 + 1e-7
    mode = p * n
    low = k < mode  # the other tail lies above the mode
    high = k > mode
    # The binary search of `a` = sign x pmf over [lo, hi] for the last x with a(x) <= target.
    sign = np.where(low, -1.0, 1.0)
    target = sign * (d * rerr)
    lo = np.where(low, np.ceil(mode), 0.0)
    hi = np.where(low, float(n), np.floor(mode))
    found = np.full(k.shape, np.nan)
    active = (low | high) & (lo < hi)
    while active.any():
        i = np.flatnonzero(active)
        mid = lo[i] + (hi[i] - lo[i]) // 2
        midval = sign[i] * stats.binom.pmf(mid, n, p[i])
        below, above = midval < target[i], midval > target[i]
        lo[i[below]] = mid[below] + 1
        hi[i[above]] = mid[above] - 1
        hit = ~below & ~above
        found[i[hit]] = mid[hit]
        active[i[hit]] = False
        active[i] &= lo[i] < hi[i]
    ends = np.flatnonzero((low | high) & np.isnan(found))
    at_lo = sign[ends] * stats.binom.pmf(lo[ends], n, p[ends]) <= target[ends]
    found[ends] = np.where(at_lo, lo[ends], lo[ends] - 1)
    out = np.ones(k.shape)
    ix = found[low]
    y = n - ix + (d[low] * rerr == stats.binom.pmf(ix, n, p[low]))
    out[low] = stats.binom.cdf(k[low], n, p[low]) + stats.binom.sf(n - y, n, p[low])
    y = found[high] + 1
    out[high] = stats.binom.cdf(y - 1, n, p[high]) + stats.binom.sf(k[high] - 1, n, p[high])
    result: np.ndarray = np.minimum(out, 1.0)
    return result


@dataclass(frozen=True)
class ExposureConcentration:
    """How far false alarms pile up in some homes beyond their share of monitored time.

    `gini`: 0 when every home has the same rate, towards 1 when a few homes' time holds all the
    false alarms (Lorenz curve of false-alarm share against time share, homes by rate). `null_low`,
    `null_median`, `null_high`: the same figure's 2.5%, 50% and 97.5% points when every home has the
    pooled rate (seeded simulation); `beyond_chance`: the observed figure is above `null_high`.
    `table`: per home, the two-sided exact test of its share of the false alarms against its share
    of the time, corrected across homes (`method`); `stands_out` where the corrected p < alpha.
    """

    homes: int
    false_alarms: int
    gini: float
    null_low: float
    null_median: float
    null_high: float
    beyond_chance: bool
    p_value: float
    draws: int
    alpha: float
    method: str
    method_text: str
    stands_out_codes: tuple[str, ...]
    table: pd.DataFrame
    reason: str | None = None


def exposure_gini(false_alarms: ArrayLike, home_months: ArrayLike) -> np.ndarray:
    """Gini of false alarms against monitored time, for one or many pilots (last axis = homes).

    Homes sorted by rate (lowest first); the Lorenz curve joins (cumulative time share, cumulative
    false-alarm share); G = 1 - 2 x (area under it, by trapezoids). Equal rates give exactly 0.
    NaN without false alarms. Every home must have monitored time.
    References: Lorenz MO (1905) JASA 9:209-219; the Gini ratio as twice the area between the curve
    and the diagonal (common practice, from memory).
    """
    x = np.atleast_2d(np.asarray(false_alarms, dtype=np.float64))
    t = np.atleast_2d(np.asarray(home_months, dtype=np.float64))
    order = np.argsort(x / t, axis=-1, kind="stable")
    xs = np.take_along_axis(x, order, -1)
    ts = np.take_along_axis(t, order, -1)
    total_x = xs.sum(-1, keepdims=True)
    cx = np.cumsum(xs, -1) / np.where(total_x > 0, total_x, 1.0)
    ct = ts / ts.sum(-1, keepdims=True)
    prev = np.concatenate([np.zeros(cx.shape[:-1] + (1,)), cx[..., :-1]], -1)
    area = (ct * (cx + prev) / 2).sum(-1)
    out: np.ndarray = np.where(total_x[..., 0] > 0, 1 - 2 * area, np.nan)
    return out


def exposure_concentration(
    homes: pd.DataFrame,
    *,
    rng: np.random.Generator,
    draws: int = 1000,
    alpha: float = 0.05,
    method: str = "holm",
) -> ExposureConcentration:
    """Concentration of false alarms against monitored time, and against chance at equal rates.

    The null band: `draws` pilots whose homes keep their monitored time but share the pooled rate
    (counts multinomial given the total, probabilities t_i / T), each scored with `exposure_gini`.
    Per home: given the total N, its count is binomial(N, t_i / T) at equal rates; the two-sided
    exact p-value (scipy `binomtest`) is corrected across homes with `adjust_p`.
    Homes without monitored time are left out. With no false alarms every figure is NaN with
    reason "no_false_alarms".
    """
    if draws < 1:
        raise ValueError("draws must be at least 1")
    codes = homes["home_code"].astype(str).to_numpy()
    k = homes["false_alarms"].to_numpy(dtype=np.float64)
    t = homes["home_months"].to_numpy(dtype=np.float64)
    mon = t > 0
    codes, k, t = codes[mon], k[mon], t[mon]
    n = int(k.sum())
    text = MULTIPLICITY_TEXT[method].format(alpha=alpha) if method in MULTIPLICITY_TEXT else ""
    if n == 0 or len(t) < 2:
        empty = pd.DataFrame(
            {"home_code": codes, "false_alarms": k.astype(np.int64), "home_months": t, "rate": k / t}
        )
        return ExposureConcentration(
            homes=len(t),
            false_alarms=n,
            gini=math.nan,
            null_low=math.nan,
            null_median=math.nan,
            null_high=math.nan,
            beyond_chance=False,
            p_value=math.nan,
            draws=0,
            alpha=alpha,
            method=method,
            method_text=text,
            stands_out_codes=(),
            table=empty,
            reason=NO_FALSE_ALARMS if n == 0 else rates.TOO_FEW_HOMES,
        )
    share = t / t.sum()
    observed = float(exposure_gini(k, t)[0])
    sims = rng.multinomial(n, share, size=draws).astype(np.float64)
    null = exposure_gini(sims, np.broadcast_to(t, sims.shape))
    low, median, high = (float(v) for v in np.quantile(null, [0.025, 0.5, 0.975]))
    p_value = float((1 + (null >= observed - 1e-12).sum()) / (1 + draws))
    p_home = binom_test_two_sided(k, n, share)
    adj = adjust_p(p_home, method)
    rate = k / t
    pooled = n / t.sum()
    stands = (adj < alpha) & (rate > pooled)
    table = pd.DataFrame(
        {
            "home_code": codes,
            "false_alarms": k.astype(np.int64),
            "home_months": t,
            "rate": rate,
            "expected": pooled * t,
            "p_value": p_home,
            "p_adjusted": adj,
            "stands_out": stands,
        }
    )
    table = table.iloc[rates.sort_order([table["p_value"], table["home_code"]], [True, True])].reset_index(
        drop=True
    )
    return ExposureConcentration(
        homes=len(t),
        false_alarms=n,
        gini=observed,
        null_low=low,
        null_median=median,
        null_high=high,
        beyond_chance=bool(observed > high),
        p_value=p_value,
        draws=draws,
        alpha=alpha,
        method=method,
        method_text=text,
        stands_out_codes=tuple(table["home_code"][table["stands_out"]]),
        table=table,
    )
