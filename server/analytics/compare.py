"""Comparing false-alarm rates of groups (firmware, hardware model, room) when homes differ.

Pure functions over per device-window rows (home, group, false alarms, home-months); no database.
Every comparison treats the home as the unit that varies: home-clustered (sandwich) variances with
t or F quantiles on G - 1 degrees of freedom, G the number of homes; a test's p-value and its
interval come from the same statistic, so p < 1 - level exactly when the interval excludes 1.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, stats

# Homes (clusters) a comparison needs before it says anything; fewer gives a reason, no flag.
MIN_HOMES = 5

TOO_FEW_HOMES = "too_few_homes"
TOO_FEW_GROUPS = "fewer_than_two_groups"
NO_EVENTS_IN_GROUP = "no_events_in_group"
NO_MONITORED_TIME = "no_monitored_time"
REFERENCE = "reference"

REASON_TEXT = {
    TOO_FEW_HOMES: "Too few homes to compare: at least {min_homes} are needed.",
    TOO_FEW_GROUPS: "Only one group has monitored time.",
    NO_EVENTS_IN_GROUP: "A group without false alarms cannot be compared by a ratio.",
    NO_MONITORED_TIME: "No monitored time.",
    REFERENCE: "The group the others are compared with.",
}

BETWEEN = "between homes: Poisson score test per pair of groups, home-clustered variance, t on homes - 1 df"
WITHIN = "within homes: home fixed effects (conditional Poisson), home-clustered variance, t on homes - 1 df"
JOINT = "score test of equal rates, home-clustered variance, F on (groups - 1, homes - 1) df"


@dataclass(frozen=True)
class GroupComparison:
    """Rates of several groups, each against a reference group, and one test that all are equal.

    `table`: one row per group (most monitored time first) with columns group, homes,
    false_alarms, home_months, rate, ratio (to the reference), low, high, p_value, differs, reason.
    `differs`: the joint test's p-value is below 1 - confidence_level.
    """

    key: str
    reference: str | None
    groups: int
    homes: int
    table: pd.DataFrame
    statistic: float
    df_num: int
    df_den: int
    p_value: float
    differs: bool
    confidence_level: float
    method: str
    reason: str | None = None


@dataclass(frozen=True)
class PairComparison:
    """Rate ratio of version a over version b, with its interval and p-value from one statistic.

    `within_homes` is True when enough homes ran both versions and the ratio compares each home
    with itself; otherwise it compares the homes of one version with those of the other.
    """

    version_a: str
    version_b: str
    events_a: int
    home_months_a: float
    events_b: int
    home_months_b: float
    estimate: float
    low: float
    high: float
    p_value: float
    differs: bool
    confidence_level: float
    homes: int
    paired_homes: int
    within_homes: bool
    method: str
    reason: str | None = None


def _check_level(confidence_level: float) -> None:
    if not 0.0 < confidence_level < 1.0:
        raise ValueError(f"confidence_level must be between 0 and 1, got {confidence_level}")


def _frame(rows: pd.DataFrame, key: str, home: str, events: str, exposure: str) -> pd.DataFrame:
    missing = [c for c in (key, home, events, exposure) if c not in rows.columns]
    if missing:
        raise ValueError(f"rows lack columns {missing}")
    f = pd.DataFrame(
        {
            "group": rows[key].astype(str).to_numpy(),
            "home": rows[home].astype(str).to_numpy(),
            "x": rows[events].to_numpy(dtype=np.float64),
            "t": rows[exposure].to_numpy(dtype=np.float64),
        }
    )
    if (f["x"] < 0).any() or (f["t"] < 0).any():
        raise ValueError("counts and monitored time must not be negative")
    return f[f["t"] > 0]


def _t_test(d: float, se: float, df: int, confidence_level: float) -> tuple[float, float, float]:
    """Interval for exp(d) and the two-sided p-value of d = 0 from one t statistic."""
    q = float(stats.t.ppf(1 - (1 - confidence_level) / 2, df))
    p = float(2 * stats.t.sf(abs(d) / se, df)) if se > 0 else (1.0 if d == 0 else 0.0)
    return math.exp(d - q * se), math.exp(d + q * se), p


def compare_groups(
    rows: pd.DataFrame,
    *,
    key: str,
    home: str = "home_code",
    events: str = "false_alarms",
    exposure: str = "home_months",
    reference: str | None = None,
    confidence_level: float = 0.95,
    min_homes: int = MIN_HOMES,
) -> GroupComparison:
    """Each group's rate against a reference group's, and a joint test that all rates are equal.

    Parameters
    ----------
    rows: per device-window rows with the home (`home`), the group value (`key`), false alarms
        (`events`) and monitored time (`exposure`, home-months). Rows without time are left out.
    reference: the group others are compared with (default: the one with most monitored time).

    The model is a Poisson regression with one rate per group and log exposure as offset, whose
    estimates are the group totals' ratios. Tests are score tests: the model is fitted under the
    hypothesis (one common rate, or a given ratio), each home's score contributions are summed over
    all its rows (homes are the clusters) and their spread, times G / (G - 1) (CR1) and never below
    the Poisson variance, scales the statistic. Fitting under the hypothesis keeps a group that
    happens to miss its high-rate homes from looking precise. Each ratio to the reference uses the
    two groups' rows, t on G - 1 degrees of freedom, and its interval is every ratio the same test
    does not reject; the joint test uses F on (groups - 1, G - 1).

    References: Liang KY, Zeger SL (1986) Biometrika 73:13-22; Boos DD (1992) On generalized score
    tests. Am Stat 46:327-333; Cameron AC, Miller DL (2015) J Human Resources 50:317-372,
    small-cluster corrections (all from memory). The statistic at the hypothesis agrees with
    statsmodels' robust score test (see the unit tests).
    """
    _check_level(confidence_level)
    f = _frame(rows, key, home, events, exposure)
    # Per home and group sums, each a pandas grouped (compensated) sum over the rows in their order,
    # as a pivot table would sum them; homes in sorted order, groups by monitored time below.
    home_at, home_names = pd.factorize(f["home"], sort=True)
    group_at, group_names = pd.factorize(f["group"], sort=True)
    n_homes, n_groups = len(home_names), len(group_names)
    cells = pd.DataFrame({"cell": home_at * n_groups + group_at, "x": f["x"], "t": f["t"]})
    cells = cells.groupby("cell", sort=True)[["x", "t"]].sum()
    cell = cells.index.to_numpy(dtype=np.int64)
    sums = f.groupby("group", sort=True)[["x", "t"]].sum()
    sums["homes"] = np.bincount(cell % n_groups, minlength=n_groups) if n_groups else np.zeros(0, np.int64)
    sums = sums.sort_values(["t"], ascending=False, kind="mergesort")
    names = [str(g) for g in sums.index]
    x_g = sums["x"].to_numpy()
    t_g = sums["t"].to_numpy()
    rate = x_g / t_g
    if reference is None and names:
        reference = names[0]
    ratio, low, high, p_value = (np.full(len(names), np.nan) for _ in range(4))
    differs = np.zeros(len(names), dtype=bool)
    reasons: list[str | None] = [None] * len(names)

    def result(statistic: float, q: int, p: float, reason: str | None) -> GroupComparison:
        table = pd.DataFrame(
            {
                "group": names,
                "homes": sums["homes"].to_numpy(dtype=np.int64),
                "false_alarms": x_g.astype(np.int64),
                "home_months": t_g,
                "rate": rate,
                "ratio": ratio,
                "low": low,
                "high": high,
                "p_value": p_value,
                "differs": differs,
                # Object, not text, so a missing reason stays None.
                "reason": pd.Series(reasons, dtype=object),
            }
        )
        return GroupComparison(
            key=key,
            reference=reference,
            groups=len(names),
            homes=n_homes,
            table=table,
            statistic=statistic,
            df_num=q,
            df_den=max(n_homes - 1, 0),
            p_value=p,
            differs=bool(p < 1 - confidence_level) if math.isfinite(p) else False,
            confidence_level=confidence_level,
            method=JOINT,
            reason=reason,
        )

    if len(names) < 2:
        return result(math.nan, 0, math.nan, TOO_FEW_GROUPS if names else NO_MONITORED_TIME)
    if reference not in names:
        raise ValueError(f"reference group {reference!r} has no monitored time")
    ref = names.index(reference)
    reasons = [REFERENCE if i == ref else None for i in range(len(names))]
    if n_homes < max(min_homes, 2):
        reasons = [REFERENCE if i == ref else TOO_FEW_HOMES for i in range(len(names))]
        return result(math.nan, 0, math.nan, TOO_FEW_HOMES)
    if x_g.sum() == 0:
        reasons = [REFERENCE if i == ref else NO_EVENTS_IN_GROUP for i in range(len(names))]
        return result(math.nan, 0, math.nan, NO_EVENTS_IN_GROUP)
    # Columns in the order of `names` (zero where a home has no row of the group).
    column = np.empty(n_groups, dtype=np.int64)
    column[group_names.get_indexer(sums.index)] = np.arange(n_groups)
    xs = np.zeros((n_homes, n_groups))
    ts = np.zeros((n_homes, n_groups))
    xs[cell // n_groups, column[cell % n_groups]] = cells["x"].to_numpy()
    ts[cell // n_groups, column[cell % n_groups]] = cells["t"].to_numpy()
    g = n_homes
    df = g - 1
    for i in range(len(names)):
        if i == ref:
            continue
        if x_g[ref] == 0:
            reasons[i] = NO_EVENTS_IN_GROUP
            continue
        in_pair = (ts[:, i] > 0) | (ts[:, ref] > 0)
        ratio[i], low[i], high[i], p_value[i] = _pair_test(
            xs[in_pair, i], ts[in_pair, i], xs[in_pair, ref], ts[in_pair, ref], df, confidence_level
        )
        differs[i] = p_value[i] < 1 - confidence_level
    others = [i for i in range(len(names)) if i != ref]
    q = len(others)
    if q > df:
        return result(math.nan, q, math.nan, TOO_FEW_HOMES)
    # Score test of one common rate r0 = N / T: each group's score, with the common rate's part
    # projected out, summed per home; the scores' covariance from the homes' sums (CR1), kept at or
    # above the Poisson (multinomial) covariance.
    n, total_t = float(x_g.sum()), float(t_g.sum())
    r0 = n / total_t
    home_x, home_t = xs.sum(axis=1), ts.sum(axis=1)
    share = t_g[others] / total_t
    per_home = (xs[:, others] - r0 * ts[:, others]) - np.outer(home_x - r0 * home_t, share)
    score = per_home.sum(axis=0)
    v = g / (g - 1) * per_home.T @ per_home
    v_model = r0 * (np.diag(t_g[others]) - np.outer(t_g[others], t_g[others]) / total_t)
    if np.trace(v) < np.trace(v_model):
        v = v_model
    statistic = float(score @ np.linalg.pinv(v) @ score) / q
    p_joint = float(stats.f.sf(statistic, q, df))
    return result(statistic, q, p_joint, None)


def _pair_t(xa: Floats, ta: Floats, xb: Floats, tb: Floats, delta: Floats | float) -> Floats:
    """Score statistic for log(rate_a / rate_b) = delta (a scalar or an array of values), with the
    home-clustered variance (CR1, kept at or above the Poisson one), for per-home sums of the two
    groups."""
    d = np.atleast_1d(np.asarray(delta, dtype=np.float64))[:, None]
    g = len(xa)
    ratio = np.exp(d)
    big_ta, big_tb = float(ta.sum()), float(tb.sum())
    n = float(xa.sum() + xb.sum())
    w = ratio * big_ta / (ratio * big_ta + big_tb)
    r0 = n / (ratio * big_ta + big_tb)
    per_home = (xa - r0 * ratio * ta) - w * (xa + xb - r0 * (ratio * ta + tb))
    score = (float(xa.sum()) - w * n)[:, 0]
    var = np.maximum(g / (g - 1) * (per_home**2).sum(axis=1), (n * w * (1 - w))[:, 0])
    out: Floats = np.divide(score, np.sqrt(var), out=np.zeros_like(score), where=var > 0)
    return out


def _pair_test(
    xa: Floats, ta: Floats, xb: Floats, tb: Floats, df: int, confidence_level: float
) -> tuple[float, float, float, float]:
    """Ratio, interval and p-value of rate a over rate b from one score statistic (`_pair_t`).

    The interval is the stretch of log ratios around the estimate where |t| stays within the t
    quantile (with a clustered variance t need not be monotone, so the stretch ends at the first
    crossing). The p-value is 2 P(T_df > m), m the largest |t| between the estimate and a ratio of
    1; so p < 1 - level exactly when the interval leaves out 1. When t is monotone, m = |t(0)|.
    """
    xa_sum, xb_sum = float(xa.sum()), float(xb.sum())
    big_ta, big_tb = float(ta.sum()), float(tb.sum())
    q = float(stats.t.ppf(1 - (1 - confidence_level) / 2, df))
    if xa_sum > 0 and xb_sum > 0:
        centre = math.log((xa_sum / big_ta) / (xb_sum / big_tb))
    else:
        centre = _BOUND if xa_sum > 0 else -_BOUND
    centre = min(max(centre, -_BOUND), _BOUND)
    grid = np.unique(np.concatenate([_GRID, [0.0, centre]]))
    # The statistic is computed only at the grid points the answer depends on (those between the
    # estimate and a ratio of 1, and outwards from the estimate to the first crossing of each
    # limit), in blocks; each point's value is what the whole grid would give there.
    stat = np.zeros(len(grid))
    known = np.zeros(len(grid), dtype=bool)

    def fill(lo: int, hi: int) -> None:
        todo = np.flatnonzero(~known[lo:hi]) + lo
        if len(todo):
            stat[todo] = _pair_t(xa, ta, xb, tb, grid[todo])
            known[todo] = True

    at = int(np.searchsorted(grid, centre))
    zero = int(np.searchsorted(grid, 0.0))
    fill(min(at, zero), max(at, zero) + 1)
    between = stat[min(at, zero) : max(at, zero) + 1]
    p = float(2 * stats.t.sf(float(np.abs(between).max()), df))

    def edge(direction: int) -> float:
        i = at
        block = _BLOCK
        while 0 <= i + direction < len(grid):
            # The next block of points outwards, then the first of them beyond the quantile.
            stop = i + direction * block
            lo, hi = (i + 1, min(stop, len(grid) - 1) + 1) if direction > 0 else (max(stop, 0), i)
            fill(lo, hi)
            ahead = stat[lo:hi] if direction > 0 else stat[lo:hi][::-1]
            beyond = np.flatnonzero(np.abs(ahead) > q)
            if len(beyond) == 0:
                i = hi - 1 if direction > 0 else lo
                block *= 2
                continue
            j = i + direction * (int(beyond[0]) + 1)
            i = j - direction
            target = math.copysign(q, stat[j])

            def f(d: float, target: float = target) -> float:
                return float(_pair_t(xa, ta, xb, tb, d)[0]) - target

            lo_d, hi_d = sorted((grid[i], grid[j]))
            if f(lo_d) * f(hi_d) < 0:
                return float(optimize.brentq(f, lo_d, hi_d, xtol=1e-10))
            return float(grid[j])
        return direction * math.inf

    low = 0.0 if xa_sum == 0 else math.exp(edge(-1))
    high = math.inf if xb_sum == 0 else math.exp(edge(1))
    est = (xa_sum / big_ta) / (xb_sum / big_tb) if xb_sum > 0 else math.inf
    return est, low, high, p


_BOUND = 30.0
_STEP = 0.02
_GRID = np.arange(-_BOUND, _BOUND + _STEP / 2, _STEP)
_BLOCK = 32  # grid points evaluated at once when walking out to a limit (doubling each time)
Floats = np.ndarray


def _within(
    pairs: pd.DataFrame, confidence_level: float
) -> tuple[float, float, float, float, int, str | None]:
    """Conditional Poisson (home fixed effects) log ratio of a over b from per-home x_a, t_a, x_b, t_b.

    Given a home's total n_h, x_ha is binomial with p_h = R t_ha / (R t_ha + t_hb). R solves
    sum_h (x_ha - n_h p_h) = 0; its sandwich variance is meat / bread^2 with bread
    sum n_h p_h (1 - p_h) and meat G / (G - 1) sum (x_ha - n_h p_h)^2, kept at or above 1 / bread.
    """
    xa, ta, xb, tb = (pairs[c].to_numpy(dtype=np.float64) for c in ("xa", "ta", "xb", "tb"))
    n = xa + xb
    use = n > 0
    xa, ta, xb, tb, n = xa[use], ta[use], xb[use], tb[use], n[use]
    g = len(n)
    if g == 0 or xa.sum() == 0 or xb.sum() == 0:
        return math.nan, math.nan, math.nan, math.nan, g, NO_EVENTS_IN_GROUP
    log_ratio_t = np.log(ta / tb)

    def score(beta: float) -> float:
        p = special_expit(beta + log_ratio_t)
        return float((xa - n * p).sum())

    beta = float(optimize.brentq(score, -50.0, 50.0, xtol=1e-12))
    p = special_expit(beta + log_ratio_t)
    bread = float((n * p * (1 - p)).sum())
    if g < 2:
        return math.nan, math.nan, math.nan, math.nan, g, TOO_FEW_HOMES
    meat = g / (g - 1) * float(((xa - n * p) ** 2).sum())
    var = max(meat / bread**2, 1 / bread)
    low, high, pv = _t_test(beta, math.sqrt(var), g - 1, confidence_level)
    return math.exp(beta), low, high, pv, g, None


def special_expit(z: np.ndarray) -> np.ndarray:
    out: np.ndarray = 1.0 / (1.0 + np.exp(-z))
    return out


def compare_pair(
    rows: pd.DataFrame,
    version_a: str,
    version_b: str,
    *,
    key: str = "firmware",
    home: str = "home_code",
    events: str = "false_alarms",
    exposure: str = "home_months",
    confidence_level: float = 0.95,
    min_homes: int = MIN_HOMES,
) -> PairComparison:
    """Rate ratio of `version_a` over `version_b`, within homes when at least `min_homes` homes with
    false alarms ran both, otherwise between homes (`compare_groups` restricted to the two).

    Within homes each home is compared with itself (conditional Poisson with home fixed effects):
    the differences between homes cancel, so only the change of version is measured; homes that ran
    one version only carry no information there. References: see `compare_groups`; conditional
    Poisson: e.g. Cameron AC, Trivedi PK (2013) Regression Analysis of Count Data, 2nd ed., ch. 9
    (from memory). Agrees with statsmodels GLM(Poisson) with home dummies, clustered by home.
    """
    _check_level(confidence_level)
    f = _frame(rows, key, home, events, exposure)
    a, b = str(version_a), str(version_b)
    fa, fb = f[f["group"] == a], f[f["group"] == b]
    xa, ta, xb, tb = float(fa["x"].sum()), float(fa["t"].sum()), float(fb["x"].sum()), float(fb["t"].sum())
    per_home = pd.DataFrame(
        {
            "xa": fa.groupby("home")["x"].sum(),
            "ta": fa.groupby("home")["t"].sum(),
            "xb": fb.groupby("home")["x"].sum(),
            "tb": fb.groupby("home")["t"].sum(),
        }
    )
    both = per_home.dropna()
    paired = int(((both["xa"] + both["xb"]) > 0).sum())
    homes = int(len(per_home))

    def result(
        est: float, low: float, high: float, p: float, used: int, within: bool, reason: str | None
    ) -> PairComparison:
        return PairComparison(
            version_a=a,
            version_b=b,
            events_a=int(xa),
            home_months_a=ta,
            events_b=int(xb),
            home_months_b=tb,
            estimate=est,
            low=low,
            high=high,
            p_value=p,
            differs=bool(p < 1 - confidence_level) if math.isfinite(p) else False,
            confidence_level=confidence_level,
            homes=used,
            paired_homes=paired,
            within_homes=within,
            method=WITHIN if within else BETWEEN,
            reason=reason,
        )

    if ta <= 0 or tb <= 0:
        return result(math.nan, math.nan, math.nan, math.nan, homes, False, NO_MONITORED_TIME)
    if paired >= max(min_homes, 2):
        est, low, high, p, used, reason = _within(both, confidence_level)
        return result(est, low, high, p, used, True, reason)
    two = f[f["group"].isin([a, b])]
    cmp = compare_groups(
        two.rename(columns={"group": "g", "home": "h"}),
        key="g",
        home="h",
        events="x",
        exposure="t",
        reference=b,
        confidence_level=confidence_level,
        min_homes=min_homes,
    )
    row = cmp.table[cmp.table["group"] == a].iloc[0]
    reason = None if row["reason"] is None else str(row["reason"])
    est = float(row["ratio"]) if xb > 0 else math.nan
    if reason is None and not math.isfinite(float(row["p_value"])):
        reason = cmp.reason
    return result(est, float(row["low"]), float(row["high"]), float(row["p_value"]), cmp.homes, False, reason)
