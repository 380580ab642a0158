"""Rates per home-month and proportions with their intervals; readiness against a target.

Pure functions over numbers and numpy arrays: no database, clock or global random state.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, special, stats

# A home-month is 365.25 / 12 = 30.4375 days of monitored time.
HOME_MONTH_DAYS = 365.25 / 12
HOME_MONTH_S = HOME_MONTH_DAYS * 86400.0

# Reasons a figure has no value; stable codes, shown on the summary through a lookup.
NO_MONITORED_TIME = "no_monitored_time"
NO_EVENTS = "no_events"
NO_TRIALS = "no_trials"
TOO_FEW_HOMES = "fewer_than_two_homes"
RATE_NOT_BELOW_TARGET = "rate_not_below_target"
HOMES_DIFFER = "homes_differ"

Floats = NDArray[np.float64]


@dataclass(frozen=True)
class Limits:
    """Lower and upper confidence limits, element by element."""

    low: Floats
    high: Floats


@dataclass(frozen=True)
class RateEstimate:
    """Events per home-month with a confidence interval."""

    events: int
    home_months: float
    estimate: float
    low: float
    high: float
    confidence_level: float
    method: str
    reason: str | None = None


@dataclass(frozen=True)
class ProportionEstimate:
    successes: int
    trials: int
    estimate: float
    low: float
    high: float
    confidence_level: float
    method: str
    reason: str | None = None


@dataclass(frozen=True)
class RatioEstimate:
    """Rate ratio a / b with an interval and the two-sided p-value for a ratio of 1."""

    events_a: int
    home_months_a: float
    events_b: int
    home_months_b: float
    estimate: float
    low: float
    high: float
    confidence_level: float
    method: str
    p_value: float
    reason: str | None = None


@dataclass(frozen=True)
class RatioTest:
    null_ratio: float
    alternative: str
    p_value: float
    method: str


@dataclass(frozen=True)
class BootstrapLimits:
    """Ratio estimates and bootstrap limits for several pilots at once (one element per pilot)."""

    estimate: Floats
    low: Floats
    high: Floats


@dataclass(frozen=True)
class BootstrapRate:
    estimate: float
    low: float
    high: float
    confidence_level: float
    method: str
    homes: int
    resamples: int
    reason: str | None = None


@dataclass(frozen=True)
class Overdispersion:
    """Pearson chi-square of per-home counts against one common rate, over its degrees of freedom.

    `ratio` is about 1 when homes share one rate and grows as they differ.
    """

    homes: int
    statistic: float
    df: int
    ratio: float
    p_value: float
    reason: str | None = None


@dataclass(frozen=True)
class Readiness:
    """The target against the upper confidence limit of the rate.

    `state` is "met" (upper limit at or below the target), "not_met" (lower limit above the
    target) or "not_yet_shown"; `more_home_months` is the extra monitored time that would show
    it met if false alarms kept arriving at the current rate (None when they would not).
    """

    state: str
    target: float
    estimate: float
    low: float
    high: float
    confidence_level: float
    more_home_months: float | None
    reason: str | None = None
    # Upper limit of the home-level bootstrap, when it was given to readiness().
    home_bootstrap_high: float | None = None


def sort_order(keys: Sequence[ArrayLike | pd.Series], ascending: Sequence[bool]) -> NDArray[np.intp]:
    """Row order of a stable sort by several keys, missing values last.

    The order `DataFrame.sort_values(..., kind="mergesort", na_position="last")` gives (it ranks
    the keys the same way, then calls np.lexsort), for the short tables of a summary, where
    building and sorting a frame costs far more than the sort itself.
    """
    labels = []
    for i, (key, asc) in enumerate(zip(reversed(keys), reversed(ascending), strict=True)):
        series = key if isinstance(key, pd.Series) else pd.Series(key)
        values = series.to_numpy() if isinstance(series.dtype, np.dtype) else series.array
        if isinstance(values, np.ndarray) and values.dtype.kind == "f":
            labels.append(values if asc else -values)  # NaN stays NaN and sorts last
        elif isinstance(values, np.ndarray) and values.dtype.kind in "iub":
            labels.append(values if asc else ~values)
        elif i == 0 and asc and series.is_monotonic_increasing:
            # The last key, already in order with no missing value: the rows' own order ranks it
            # (equal values stay in that order, as a stable sort would leave them).
            labels.append(np.arange(len(series)))
        else:
            codes, uniques = pd.factorize(values, sort=True)
            n = len(uniques)
            missing = codes == -1
            codes = np.where(missing, n, codes)
            labels.append(codes if asc else np.where(missing, codes, n - codes - 1))
    order: NDArray[np.intp] = np.lexsort(labels)
    return order


def _check_level(confidence_level: float) -> None:
    if not 0.0 < confidence_level < 1.0:
        raise ValueError(f"confidence_level must be between 0 and 1, got {confidence_level}")


# ---------------------------------------------------------------------------------------
# Poisson counts and rates


def _chi2_ppf(q: float, df: Floats) -> Floats:
    """`scipy.stats.chi2.ppf(q, df)` for 0 < q < 1 and df > 0, by the distribution's own formula
    2 gammaincinv(df / 2, q): the same values, without the generic argument handling that costs more
    than the quantiles themselves on the short arrays of a summary."""
    out: Floats = 2 * special.gammaincinv(df / 2, q)
    return out


def garwood_limits(events: ArrayLike, confidence_level: float = 0.95) -> Limits:
    """Two-sided exact limits on a Poisson mean, for each count in `events`.

    lower = chi2(alpha/2; 2k) / 2 (exactly 0 when k = 0), upper = chi2(1 - alpha/2; 2k + 2) / 2.

    References: Garwood F (1936) Fiducial limits for the Poisson distribution. Biometrika 28:437-442.
    """
    _check_level(confidence_level)
    k = np.asarray(events, dtype=np.float64)
    if np.any(k < 0):
        raise ValueError("event counts must not be negative")
    alpha = 1.0 - confidence_level
    if k.ndim == 1 and len(k) > 64:
        # Counts repeat (many homes see the same few numbers): find each distinct count's limits once.
        distinct, at = np.unique(k, return_inverse=True)
        low, high = _garwood(distinct, alpha)
        return Limits(low=low[at], high=high[at])
    low, high = _garwood(k, alpha)
    return Limits(low=low, high=high)


def _garwood(k: Floats, alpha: float) -> tuple[Floats, Floats]:
    # chi2 with 0 degrees of freedom is undefined: the lower limit at k = 0 is 0 by definition.
    low = np.where(k > 0, _chi2_ppf(alpha / 2, np.maximum(2 * k, 1e-300)) / 2, 0.0)
    high = _chi2_ppf(1 - alpha / 2, 2 * k + 2) / 2
    return np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)


@dataclass(frozen=True)
class RateArrays:
    """Rates per home-month with exact intervals as plain arrays: `poisson_rates` without the frame."""

    events: NDArray[np.int64]
    home_months: Floats
    estimate: Floats
    low: Floats
    high: Floats

    def reasons(self) -> pd.Series:
        """None, or "no_monitored_time" where there is none (object dtype keeps the None)."""
        reasons = np.full(len(self.home_months), None, dtype=object)
        reasons[~(self.home_months > 0)] = NO_MONITORED_TIME
        return pd.Series(reasons, dtype=object)


def poisson_rate_arrays(
    events: ArrayLike,
    home_months: ArrayLike,
    *,
    confidence_level: float = 0.95,
    method: str = "garwood",
) -> RateArrays:
    """The figures of `poisson_rates`, element by element, as arrays."""
    if method != "garwood":
        raise ValueError(f"unknown method {method!r}; expected 'garwood'")
    k = np.atleast_1d(np.asarray(events, dtype=np.float64))
    t = np.atleast_1d(np.asarray(home_months, dtype=np.float64))
    k, t = np.broadcast_arrays(k, t)
    if np.any(t < 0):
        raise ValueError("monitored time must not be negative")
    lim = garwood_limits(k, confidence_level)
    has_time = t > 0
    safe_t = np.where(has_time, t, 1.0)
    nan = np.nan
    return RateArrays(
        events=k.astype(np.int64),
        home_months=t,
        estimate=np.where(has_time, k / safe_t, nan),
        low=np.where(has_time, lim.low / safe_t, nan),
        high=np.where(has_time, lim.high / safe_t, nan),
    )


def poisson_rates(
    events: ArrayLike,
    home_months: ArrayLike,
    *,
    confidence_level: float = 0.95,
    method: str = "garwood",
) -> pd.DataFrame:
    """Rates per home-month with exact intervals, one row per element.

    Returns a frame with columns events, home_months, estimate, low, high, confidence_level,
    method, reason. Zero monitored time gives NaN limits and reason "no_monitored_time".
    """
    r = poisson_rate_arrays(events, home_months, confidence_level=confidence_level, method=method)
    return pd.DataFrame(
        {
            "events": r.events,
            "home_months": r.home_months,
            "estimate": r.estimate,
            "low": r.low,
            "high": r.high,
            "confidence_level": confidence_level,
            "method": method,
            "reason": r.reasons(),
        }
    )


def poisson_rate(
    events: int, home_months: float, *, confidence_level: float = 0.95, method: str = "garwood"
) -> RateEstimate:
    """Events per home-month with the two-sided exact (Garwood) interval.

    Parameters
    ----------
    events: count of events (false alarms).
    home_months: monitored time in home-months (30.4375 days each).

    Returns
    -------
    RateEstimate; with no monitored time the estimate and limits are NaN and `reason` is
    "no_monitored_time". With zero events the lower limit is exactly 0.

    References: Garwood (1936), Biometrika 28:437-442.
    """
    r = poisson_rate_arrays([events], [home_months], confidence_level=confidence_level, method=method)
    return RateEstimate(
        events=int(events),
        home_months=float(home_months),
        estimate=float(r.estimate[0]),
        low=float(r.low[0]),
        high=float(r.high[0]),
        confidence_level=confidence_level,
        method=method,
        reason=None if home_months > 0 else NO_MONITORED_TIME,
    )


def upper_bound_one_sided(events: int, home_months: float, *, confidence_level: float = 0.95) -> float:
    """One-sided exact upper limit on the rate: chi2(level; 2k + 2) / 2 / T.

    With no events this is -ln(1 - level) / T, 2.996 / T at 95%: the "rule of three".
    NaN without monitored time.

    References: Hanley JA, Lippman-Hand A (1983) If nothing goes wrong, is everything all right?
    JAMA 249:1743-1745.
    """
    _check_level(confidence_level)
    if home_months <= 0:
        return math.nan
    return float(stats.chi2.ppf(confidence_level, 2 * events + 2) / 2 / home_months)


# ---------------------------------------------------------------------------------------
# Proportions (detection on staged events)

PROPORTION_METHODS = ("wilson", "clopper-pearson")


def proportion_limits(
    successes: ArrayLike, trials: ArrayLike, *, confidence_level: float = 0.95, method: str = "wilson"
) -> Limits:
    """Two-sided limits for binomial proportions, element by element (NaN where trials = 0).

    method "wilson": Wilson EB (1927) Probable inference, the law of succession, and statistical
    inference. JASA 22:209-212 (the score interval without continuity correction).
    method "clopper-pearson": Clopper CJ, Pearson ES (1934) Biometrika 26:404-413, as beta quantiles
    beta(alpha/2; x, n - x + 1) and beta(1 - alpha/2; x + 1, n - x).
    See also Newcombe RG (1998) Stat Med 17:857-872, methods 3 and 5.
    """
    _check_level(confidence_level)
    x = np.asarray(successes, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    x, n = np.broadcast_arrays(x, n)
    if np.any(x < 0) or np.any(x > n):
        raise ValueError("successes must lie between 0 and the number of trials")
    alpha = 1.0 - confidence_level
    ok = n > 0
    safe_n = np.where(ok, n, 1.0)
    if method == "wilson":
        z = special.ndtri(1 - alpha / 2)  # stats.norm.ppf, without its argument handling
        centre = (x + z * z / 2) / (safe_n + z * z)
        half = z / (safe_n + z * z) * np.sqrt(x * (safe_n - x) / safe_n + z * z / 4)
        low, high = centre - half, centre + half
    elif method == "clopper-pearson":
        low = stats.beta.ppf(alpha / 2, np.maximum(x, 1e-300), safe_n - x + 1)
        high = stats.beta.ppf(1 - alpha / 2, x + 1, np.maximum(safe_n - x, 1e-300))
    else:
        raise ValueError(f"unknown method {method!r}; expected one of {PROPORTION_METHODS}")
    # Exact edges: no successes gives a lower limit of 0, all successes an upper limit of 1.
    low = np.where(x == 0, 0.0, np.clip(low, 0.0, 1.0))
    high = np.where(x == safe_n, 1.0, np.clip(high, 0.0, 1.0))
    return Limits(
        low=np.where(ok, low, np.nan).astype(np.float64), high=np.where(ok, high, np.nan).astype(np.float64)
    )


def proportion(
    successes: int, trials: int, *, confidence_level: float = 0.95, method: str = "wilson"
) -> ProportionEstimate:
    """A proportion (for example staged events detected) with its two-sided interval.

    With no trials the estimate and limits are NaN and `reason` is "no_trials".
    References: see `proportion_limits`.
    """
    lim = proportion_limits([successes], [trials], confidence_level=confidence_level, method=method)
    return ProportionEstimate(
        successes=int(successes),
        trials=int(trials),
        estimate=successes / trials if trials > 0 else math.nan,
        low=float(lim.low[0]),
        high=float(lim.high[0]),
        confidence_level=confidence_level,
        method=method,
        reason=None if trials > 0 else NO_TRIALS,
    )


# ---------------------------------------------------------------------------------------
# Two rates (firmware A against firmware B)


def rate_ratio(
    events_a: int,
    home_months_a: float,
    events_b: int,
    home_months_b: float,
    *,
    confidence_level: float = 0.95,
) -> RatioEstimate:
    """Ratio of two Poisson rates, (events_a / T_a) / (events_b / T_b), with its exact conditional interval.

    Given N = x_a + x_b, x_a is binomial with p = R T_a / (R T_a + T_b). The interval maps the
    Clopper-Pearson limits (pL, pU) for x_a of N through R = p / (1 - p) * T_b / T_a; the p-value is
    the two-sided exact conditional test of R = 1 (see `rate_ratio_test`).

    References: Gu K, Ng HKT, Tang ML, Schucany WR (2008) Testing the ratio of two Poisson rates.
    Biometrical Journal 50:283-298. Clopper & Pearson (1934).
    """
    _check_level(confidence_level)
    method = "exact-conditional"
    total = events_a + events_b

    def result(
        estimate: float, low: float, high: float, p_value: float, reason: str | None = None
    ) -> RatioEstimate:
        return RatioEstimate(
            events_a=int(events_a),
            home_months_a=float(home_months_a),
            events_b=int(events_b),
            home_months_b=float(home_months_b),
            estimate=estimate,
            low=low,
            high=high,
            confidence_level=confidence_level,
            method=method,
            p_value=p_value,
            reason=reason,
        )

    if home_months_a <= 0 or home_months_b <= 0:
        return result(math.nan, math.nan, math.nan, math.nan, NO_MONITORED_TIME)
    if total == 0:
        return result(math.nan, 0.0, math.inf, 1.0, NO_EVENTS)
    lim = proportion_limits([events_a], [total], confidence_level=confidence_level, method="clopper-pearson")
    scale = home_months_b / home_months_a

    def to_ratio(p: float) -> float:
        return math.inf if p >= 1.0 else p / (1.0 - p) * scale

    estimate = math.inf if events_b == 0 else (events_a / home_months_a) / (events_b / home_months_b)
    p_value = rate_ratio_test(events_a, home_months_a, events_b, home_months_b).p_value
    return result(estimate, to_ratio(float(lim.low[0])), to_ratio(float(lim.high[0])), p_value)


def rate_ratio_test(
    events_a: int,
    home_months_a: float,
    events_b: int,
    home_months_b: float,
    *,
    null_ratio: float = 1.0,
    alternative: str = "two-sided",
    mid_p: bool = False,
) -> RatioTest:
    """Exact conditional test of rate_a / rate_b = null_ratio (binomial on the split of counts).

    alternative: "two-sided" (probabilities no larger than the observed one, as in
    scipy.stats.binomtest), "larger" (ratio above null_ratio) or "smaller". mid_p subtracts half
    the probability of the observed split from the p-value (the mid-p value; Lancaster 1961).

    References: Gu et al. (2008), Biometrical Journal 50:283-298; Lancaster HO (1961) Significance
    tests in discrete distributions. JASA 56:223-234 (from memory). Agrees with statsmodels
    `test_poisson_2indep(method="exact-cond" | "cond-midp")`.
    """
    if alternative not in ("two-sided", "larger", "smaller"):
        raise ValueError(f"unknown alternative {alternative!r}")
    if home_months_a <= 0 or home_months_b <= 0 or null_ratio <= 0:
        raise ValueError("monitored times and the null ratio must be positive")
    n = events_a + events_b
    p0 = null_ratio * home_months_a / (null_ratio * home_months_a + home_months_b)
    method = "exact-conditional mid-p" if mid_p else "exact-conditional"
    if n == 0:
        return RatioTest(null_ratio=null_ratio, alternative=alternative, p_value=1.0, method=method)
    if alternative == "larger":
        p = float(stats.binom.sf(events_a - 1, n, p0))  # P(X >= x)
    elif alternative == "smaller":
        p = float(stats.binom.cdf(events_a, n, p0))  # P(X <= x)
    else:
        p = float(stats.binomtest(events_a, n, p0).pvalue)
    if mid_p:
        p -= float(stats.binom.pmf(events_a, n, p0)) / 2
    return RatioTest(null_ratio=null_ratio, alternative=alternative, p_value=p, method=method)


# ---------------------------------------------------------------------------------------
# Homes are not alike: cluster bootstrap and overdispersion

BOOTSTRAP_METHODS = ("bca", "percentile")
# Cap on the resampling index array per chunk of pilots (elements), to bound memory.
_CHUNK_ELEMENTS = 1 << 23


def _row_quantiles(sorted_rows: Floats, q: Floats) -> Floats:
    """Linear-interpolation quantile (numpy's default) of each sorted row at its own level q."""
    b = sorted_rows.shape[1]
    h = np.clip(q, 0.0, 1.0) * (b - 1)
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, b - 1)
    frac = h - lo
    rows = np.arange(sorted_rows.shape[0])
    out: Floats = sorted_rows[rows, lo] + frac * (sorted_rows[rows, hi] - sorted_rows[rows, lo])
    return out


def home_bootstrap_limits(
    events: ArrayLike,
    home_months: ArrayLike,
    *,
    rng: np.random.Generator,
    resamples: int = 2000,
    confidence_level: float = 0.95,
    method: str = "bca",
) -> BootstrapLimits:
    """Home-level bootstrap limits of the ratio estimator for one or many pilots at once.

    Parameters
    ----------
    events, home_months: arrays of shape (homes,) or (pilots, homes); every home must have
        monitored time. Each resample draws homes with replacement; its estimate is the drawn
        homes' total events over their total home-months.
    rng: the only source of randomness (seed it for a reproducible interval).
    method: "bca" (bias-corrected and accelerated, acceleration from the jackknife over homes)
        or "percentile".

    References: Efron B (1987) Better bootstrap confidence intervals. JASA 82:171-185;
    Davison AC, Hinkley DV (1997) Bootstrap Methods and their Application, section 3.8 on
    resampling clusters (both from memory).
    """
    _check_level(confidence_level)
    if method not in BOOTSTRAP_METHODS:
        raise ValueError(f"unknown method {method!r}; expected one of {BOOTSTRAP_METHODS}")
    if resamples < 2:
        raise ValueError("resamples must be at least 2")
    x = np.atleast_2d(np.asarray(events, dtype=np.float64))
    t = np.atleast_2d(np.asarray(home_months, dtype=np.float64))
    if x.shape != t.shape:
        raise ValueError("events and home_months must have the same shape")
    if np.any(t <= 0):
        raise ValueError("every home passed to the bootstrap needs monitored time")
    pilots, homes = x.shape
    if homes < 2:
        raise ValueError("the home bootstrap needs at least two homes")
    alpha = 1.0 - confidence_level
    levels = np.array([alpha / 2, 1 - alpha / 2])
    total_x, total_t = x.sum(axis=1), t.sum(axis=1)
    estimate = total_x / total_t
    low = np.empty(pilots)
    high = np.empty(pilots)
    chunk = max(1, _CHUNK_ELEMENTS // (resamples * homes))
    for start in range(0, pilots, chunk):
        sl = slice(start, min(start + chunk, pilots))
        xs, ts, est = x[sl], t[sl], estimate[sl]
        m = xs.shape[0]
        idx = rng.integers(0, homes, size=(m, resamples, homes))
        # One pilot at a time through np.take: the same sums as fancy indexing the chunk, quicker.
        draws = np.empty((m, resamples))
        for j in range(m):
            draws[j] = np.take(xs[j], idx[j]).sum(axis=1) / np.take(ts[j], idx[j]).sum(axis=1)
        draws.sort(axis=1)
        if method == "percentile":
            q = np.broadcast_to(levels, (m, 2))
        else:
            below = (draws < est[:, None]).mean(axis=1) + 0.5 * (draws == est[:, None]).mean(axis=1)
            # Keep z0 finite when every resample falls on one side of the estimate.
            z0 = stats.norm.ppf(np.clip(below, 0.5 / resamples, 1 - 0.5 / resamples))
            jack = (total_x[sl, None] - xs) / (total_t[sl, None] - ts)
            d = jack.mean(axis=1, keepdims=True) - jack
            ss = (d**2).sum(axis=1)
            accel = np.divide((d**3).sum(axis=1), 6 * ss**1.5, out=np.zeros(m), where=ss > 0)
            za = stats.norm.ppf(levels)[None, :]
            zz = z0[:, None] + za
            q = stats.norm.cdf(z0[:, None] + zz / (1 - accel[:, None] * zz))
        low[sl] = _row_quantiles(draws, np.ascontiguousarray(q[:, 0]))
        high[sl] = _row_quantiles(draws, np.ascontiguousarray(q[:, 1]))
    return BootstrapLimits(estimate=estimate, low=low, high=high)


def home_bootstrap(
    events: ArrayLike,
    home_months: ArrayLike,
    *,
    rng: np.random.Generator,
    resamples: int = 2000,
    confidence_level: float = 0.95,
    method: str = "bca",
) -> BootstrapRate:
    """Home-level (cluster) bootstrap interval for the false-alarm rate of one pilot.

    Homes without monitored time are left out (they carry no information on the rate). Fewer
    than two homes left gives NaN limits with reason "fewer_than_two_homes" (or
    "no_monitored_time" when none has any). References: see `home_bootstrap_limits`.
    """
    x = np.asarray(events, dtype=np.float64)
    t = np.asarray(home_months, dtype=np.float64)
    keep = t > 0
    x, t = x[keep], t[keep]
    name = f"home bootstrap ({method})"
    if len(t) < 2:
        reason = NO_MONITORED_TIME if len(t) == 0 else TOO_FEW_HOMES
        est = float(x.sum() / t.sum()) if len(t) else math.nan
        return BootstrapRate(
            estimate=est,
            low=math.nan,
            high=math.nan,
            confidence_level=confidence_level,
            method=name,
            homes=len(t),
            resamples=resamples,
            reason=reason,
        )
    lim = home_bootstrap_limits(
        x, t, rng=rng, resamples=resamples, confidence_level=confidence_level, method=method
    )
    return BootstrapRate(
        estimate=float(lim.estimate[0]),
        low=float(lim.low[0]),
        high=float(lim.high[0]),
        confidence_level=confidence_level,
        method=name,
        homes=len(t),
        resamples=resamples,
    )


def overdispersion(events: ArrayLike, home_months: ArrayLike) -> Overdispersion:
    """Pearson chi-square over homes against the pooled rate, with homes - 1 degrees of freedom.

    X2 = sum_i (x_i - r t_i)^2 / (r t_i), r = sum x / sum t. Homes without monitored time are left
    out. No events gives NaN with reason "no_events" (every expected count is zero).
    References: common practice for Poisson counts (for example McCullagh P, Nelder JA (1989)
    Generalized Linear Models, 2nd ed., section 4.5; from memory).
    """
    x = np.asarray(events, dtype=np.float64)
    t = np.asarray(home_months, dtype=np.float64)
    keep = t > 0
    x, t = x[keep], t[keep]
    homes = len(t)
    if homes < 2:
        reason = NO_MONITORED_TIME if homes == 0 else TOO_FEW_HOMES
        return Overdispersion(
            homes=homes, statistic=math.nan, df=0, ratio=math.nan, p_value=math.nan, reason=reason
        )
    if x.sum() == 0:
        return Overdispersion(
            homes=homes, statistic=math.nan, df=homes - 1, ratio=math.nan, p_value=math.nan, reason=NO_EVENTS
        )
    expected = x.sum() / t.sum() * t
    statistic = float(((x - expected) ** 2 / expected).sum())
    df = homes - 1
    return Overdispersion(
        homes=homes,
        statistic=statistic,
        df=df,
        ratio=statistic / df,
        p_value=float(stats.chi2.sf(statistic, df)),
    )


# ---------------------------------------------------------------------------------------
# Readiness


def readiness(
    events: int,
    home_months: float,
    target: float,
    *,
    confidence_level: float = 0.95,
    home_bootstrap_high: float | None = None,
) -> Readiness:
    """Whether the false-alarm rate is shown to be at or below `target` per home-month.

    Uses the two-sided exact interval (the one printed beside the rate): "met" when its upper
    limit is at or below the target, "not_met" when its lower limit is above it, otherwise
    "not_yet_shown". For "not_yet_shown" with the rate below the target, `more_home_months` is
    the smallest extra monitored time T' - T at which the upper limit for r T' expected events
    (r the current rate; counts treated as continuous through the chi-square quantile) falls to
    the target.

    With `home_bootstrap_high` (the home-level bootstrap's upper limit), "met" also needs that limit
    at or below the target: when homes are not alike the Poisson interval is too narrow, so a target
    met by it alone is reported "not_yet_shown" with reason HOMES_DIFFER (more homes, not only more
    months, are needed).
    """
    if target <= 0:
        raise ValueError("the target must be positive")
    rate = poisson_rate(events, home_months, confidence_level=confidence_level)

    def result(state: str, more: float | None, reason: str | None = None) -> Readiness:
        return Readiness(
            state=state,
            target=target,
            estimate=rate.estimate,
            low=rate.low,
            high=rate.high,
            confidence_level=confidence_level,
            more_home_months=more,
            reason=reason,
            home_bootstrap_high=home_bootstrap_high,
        )

    if rate.reason is not None:
        return result("not_yet_shown", None, rate.reason)
    if rate.high <= target:
        homes_high = home_bootstrap_high
        if homes_high is not None and math.isfinite(homes_high) and homes_high > target:
            return result("not_yet_shown", None, HOMES_DIFFER)
        return result("met", 0.0)
    if rate.low > target:
        return result("not_met", None)
    r = rate.estimate
    if r >= target:
        return result("not_yet_shown", None, RATE_NOT_BELOW_TARGET)
    q = 1 - (1 - confidence_level) / 2

    def excess(total: float) -> float:
        return float(stats.chi2.ppf(q, 2 * r * total + 2) / 2 - target * total)

    hi = 2.0 * home_months
    while excess(hi) > 0:
        hi *= 2.0
    needed = float(optimize.brentq(excess, home_months, hi, xtol=1e-9, rtol=1e-12))
    return result("not_yet_shown", needed - home_months)
