"""The false-alarm rate of a pilot judged over homes, and the one readiness rule built on it.

Pure functions over per-home counts and monitored time; no database, clock or random state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, special, stats

from server.analytics import rates

Floats = NDArray[np.float64]

# Homes needed before the spread between homes can be judged at all.
MIN_HOMES = 10

# The skewness-corrected quantile may stretch the plain t quantile by at most this factor (chosen
# by the simulation study in docs/statistics.md: coverage held, no runaway bounds).
SKEW_STRETCH = 1.5

# Reasons (stable codes; the page shows REASON_TEXT[reason]).
TOO_FEW_HOMES = "too_few_homes"
NO_MONITORED_TIME = rates.NO_MONITORED_TIME
AWAITING_REVIEW = "awaiting_review"
RATE_NOT_BELOW_TARGET = rates.RATE_NOT_BELOW_TARGET
MORE_TIME_NEEDED = "more_time_needed"

REASON_TEXT = {
    TOO_FEW_HOMES: "Too few homes to judge spread: at least {min_homes} homes with monitored time needed.",
    NO_MONITORED_TIME: "No monitored time yet.",
    AWAITING_REVIEW: (
        "{open_count} alerts still await review or were marked unsure; the target holds only if none of "
        "them turns out to be a false alarm."
    ),
    RATE_NOT_BELOW_TARGET: "The rate so far is not below the target.",
    MORE_TIME_NEEDED: "The rate is below the target, but not yet by enough to be sure.",
}

METHOD = (
    "home-level rate: log scale, home-clustered (CR3) variance, t and skewness-corrected t quantiles, "
    "never narrower than exact Poisson"
)


def readiness_rule(confidence_level: float = 0.95) -> str:
    """The one sentence that says when a target counts as met (printed beside every verdict)."""
    one_sided = 1 - (1 - confidence_level) / 2
    return (
        f"Met when the upper end of the {confidence_level:.0%} confidence interval for the home-level "
        f"false-alarm rate (a one-sided {one_sided:.1%} upper bound), counting every alert still awaiting "
        "review or marked unsure as a false alarm, is at or below the target."
    )


READINESS_RULE = readiness_rule(0.95)


@dataclass(frozen=True)
class HomeRate:
    """False alarms per home-month over a set of homes, with an interval that allows homes to differ.

    `dispersion` is the variance of the estimate over what pure Poisson counting would give
    (1 when homes look alike; never below 1). With fewer than `min_homes` homes the limits are NaN
    and `reason` is "too_few_homes".
    """

    homes: int
    events: int
    home_months: float
    estimate: float
    low: float
    high: float
    confidence_level: float
    dispersion: float
    method: str
    reason: str | None = None


@dataclass(frozen=True)
class ReadinessVerdict:
    """Readiness of one class against its target, under the one rule (`rule`).

    `*_none` figures count none of the open alerts (awaiting review or unsure) as false alarms,
    `*_all` count every one of them. `state`: "met", "not_met" or "not_yet_shown" (with `reason`).
    `more_home_months`: extra monitored time over the same homes that would show the target met if
    false alarms kept arriving at the current rate and the homes kept their spread (None when the
    rate is not below the target or spread cannot be judged).
    """

    state: str
    reason: str | None
    rule: str
    target: float
    confidence_level: float
    homes: int
    home_months: float
    false_alarms: int
    open_count: int
    unusable: int
    estimate_none: float
    low_none: float
    high_none: float
    estimate_all: float
    low_all: float
    high_all: float
    more_home_months: float | None
    method: str

    @property
    def reason_text(self) -> str | None:
        """The reason as one sentence for the page (None when there is none)."""
        if self.reason is None:
            return None
        return REASON_TEXT[self.reason].format(min_homes=MIN_HOMES, open_count=self.open_count)


def _check_level(confidence_level: float) -> None:
    if not 0.0 < confidence_level < 1.0:
        raise ValueError(f"confidence_level must be between 0 and 1, got {confidence_level}")


def home_rate_limits(
    events: ArrayLike, home_months: ArrayLike, *, confidence_level: float = 0.95
) -> tuple[Floats, Floats, Floats, Floats]:
    """Estimate, low, high and dispersion for one or many pilots (arrays of shape (homes,) or
    (pilots, homes)); every home must have monitored time and there must be at least two homes.

    The estimate is total events over total home-months (the ratio estimator). Each home's
    residual e_i = x_i - r t_i is scaled by 1 / (1 - h_i), h_i = t_i / T (the jackknife-type "CR3"
    cluster variance, which does not shrink for homes that carry much of the time), giving
    se(r)^2 = sum (e_i / (1 - h_i))^2 / T^2, kept at or above the Poisson r / T. On the log scale
    (cv = se / r) two intervals are formed with t quantiles on G - 1 degrees of freedom:
    r exp(+-t cv), and the same after Hall's skewness-correcting transformation of the t statistic
    (skewness of the homes' scaled residuals): false alarms pile up in a few homes, so the rate is
    skewed and a symmetric interval misses high too often. The interval reported is the union of the
    two, widened to contain the exact (Garwood) interval. With zero events it is [0, Garwood upper].

    References: Cameron AC, Miller DL (2015) A practitioner's guide to cluster-robust inference.
    J Human Resources 50:317-372 (CR3, G - 1 t quantiles); Hall P (1992) On the removal of skewness
    by transformation. JRSS B 54:221-228; Garwood (1936) (all from memory).
    """
    _check_level(confidence_level)
    x = np.atleast_2d(np.asarray(events, dtype=np.float64))
    t = np.atleast_2d(np.asarray(home_months, dtype=np.float64))
    if x.shape != t.shape:
        raise ValueError("events and home_months must have the same shape")
    if np.any(t <= 0):
        raise ValueError("every home needs monitored time")
    if np.any(x < 0):
        raise ValueError("event counts must not be negative")
    g = x.shape[1]
    if g < 2:
        raise ValueError("a home-level interval needs at least two homes")
    alpha = 1 - confidence_level
    total_x, total_t = x.sum(axis=1), t.sum(axis=1)
    r = total_x / total_t
    h = t / total_t[:, None]
    scaled = (x - r[:, None] * t) / (1 - h)
    var = (scaled**2).sum(axis=1) / total_t**2
    safe_x = np.where(total_x > 0, total_x, 1.0)
    safe_r = np.where(total_x > 0, r, 1.0)
    cv2 = np.maximum(var / safe_r**2, 1 / safe_x)
    dispersion = np.where(total_x > 0, cv2 * safe_x, np.nan)
    c = float(stats.t.ppf(1 - alpha / 2, g - 1))
    cv = np.sqrt(cv2)
    centred = scaled - scaled.mean(axis=1, keepdims=True)
    m2 = (centred**2).mean(axis=1)
    m3 = (centred**3).mean(axis=1)
    skew = np.divide(m3, m2**1.5, out=np.zeros_like(m2), where=m2 > 0)
    # Hall's inverse runs away once 1 + 3a(q - a/2) turns negative (one home holding half of the
    # false alarms, an ordinary pilot): the corrected quantile is held within SKEW_STRETCH x c.
    reach = SKEW_STRETCH * c
    low = r * np.minimum(np.exp(-c * cv), np.exp(-cv * np.minimum(_hall_inverse(c, skew, g), reach)))
    high = r * np.maximum(np.exp(c * cv), np.exp(cv * np.minimum(-_hall_inverse(-c, skew, g), reach)))
    # Never narrower than exact Poisson counting over the same time.
    g_low = np.where(total_x > 0, special.gammaincinv(np.maximum(total_x, 1e-300), alpha / 2), 0.0) / total_t
    g_high = special.gammaincinv(total_x + 1, 1 - alpha / 2) / total_t
    low = np.where(total_x > 0, np.minimum(low, g_low), 0.0)
    high = np.where(total_x > 0, np.maximum(high, g_high), g_high)
    return r, low, high, dispersion


def _hall_inverse(q: float, skew: Floats, n: int) -> Floats:
    """Inverse of Hall's (1992) transformation g(t) = t + a t^2 + a^2 t^3 / 3 + a / 2 with
    a = skew / (3 sqrt n), written as g(t) = ((1 + a t)^3 - 1) / (3 a) + a / 2 (monotone for every a),
    evaluated at the quantile q."""
    a = skew / (3 * math.sqrt(n))
    small = np.abs(a) < 1e-9
    safe_a = np.where(small, 1.0, a)
    out: Floats = np.where(small, q, (np.cbrt(1 + 3 * safe_a * (q - a / 2)) - 1) / safe_a)
    return out


def home_rate(
    events: ArrayLike,
    home_months: ArrayLike,
    *,
    confidence_level: float = 0.95,
    min_homes: int = MIN_HOMES,
) -> HomeRate:
    """The home-level false-alarm rate of one pilot with its interval (see `home_rate_limits`).

    Homes without monitored time are left out (they say nothing about the rate). Fewer than
    `min_homes` homes gives the estimate with NaN limits and reason "too_few_homes"; none gives
    reason "no_monitored_time".
    """
    _check_level(confidence_level)
    x = np.asarray(events, dtype=np.float64).ravel()
    t = np.asarray(home_months, dtype=np.float64).ravel()
    if x.shape != t.shape:
        raise ValueError("events and home_months must have the same length")
    keep = t > 0
    x, t = x[keep], t[keep]
    homes = len(t)
    total_x, total_t = int(x.sum()), float(t.sum())
    if homes == 0 or homes < max(min_homes, 2):
        return HomeRate(
            homes=homes,
            events=total_x,
            home_months=total_t,
            estimate=total_x / total_t if homes else math.nan,
            low=math.nan,
            high=math.nan,
            confidence_level=confidence_level,
            dispersion=math.nan,
            method=METHOD,
            reason=NO_MONITORED_TIME if homes == 0 else TOO_FEW_HOMES,
        )
    r, low, high, disp = home_rate_limits(x, t, confidence_level=confidence_level)
    return HomeRate(
        homes=homes,
        events=total_x,
        home_months=total_t,
        estimate=float(r[0]),
        low=float(low[0]),
        high=float(high[0]),
        confidence_level=confidence_level,
        dispersion=float(disp[0]),
        method=METHOD,
    )


def _more_home_months(rate: HomeRate, target: float) -> float | None:
    """Extra monitored time at which the upper limit would reach the target, keeping the rate and
    the dispersion as they are (variance proportional to the expected count)."""
    r = rate.estimate
    if not (r < target) or rate.homes < 2 or not math.isfinite(rate.high):
        return None
    alpha = 1 - rate.confidence_level
    c = float(stats.t.ppf(1 - alpha / 2, rate.homes - 1))
    phi = rate.dispersion if math.isfinite(rate.dispersion) else 1.0

    def upper(total: float) -> float:
        expected = r * total
        log_high = c * math.sqrt(phi / expected) if expected > 0 else math.inf
        exact = float(special.gammaincinv(expected + 1, 1 - alpha / 2)) / total
        return max(r * math.exp(log_high), exact) if expected > 0 else exact

    t0 = rate.home_months
    if upper(t0) <= target:
        # The skewness part of the interval, not the time, keeps the target from being met.
        return None
    hi = 2.0 * t0
    while upper(hi) > target:
        hi *= 2.0
        if hi > 1e9 * t0:
            return None
    needed = float(optimize.brentq(lambda s: upper(s) - target, t0, hi, xtol=1e-9, rtol=1e-10))
    return needed - t0


def readiness_verdict(
    false_alarms: ArrayLike,
    open: ArrayLike,
    home_months: ArrayLike,
    target: float,
    *,
    unusable: int = 0,
    confidence_level: float = 0.95,
    min_homes: int = MIN_HOMES,
) -> ReadinessVerdict:
    """Readiness under the one rule (`readiness_rule`), per-home counts in.

    Parameters
    ----------
    false_alarms: per home, disturbances judged false alarms.
    open: per home, disturbances awaiting review or marked unsure.
    home_months: per home, monitored time.
    unusable: alerts whose clip could not be judged; passed through to be shown.

    "met": the upper limit with every open one counted as a false alarm is at or below the
    target. "not_met": the lower limit with none of them is above the target. Otherwise
    "not_yet_shown" with reason "too_few_homes", "awaiting_review" (it would be met if none of the
    open ones were false alarms), "rate_not_below_target" or "more_time_needed".
    """
    if not target > 0:
        raise ValueError("the target must be positive")
    if unusable < 0:
        raise ValueError("unusable must not be negative")
    fa = np.asarray(false_alarms, dtype=np.float64).ravel()
    op = np.asarray(open, dtype=np.float64).ravel()
    hm = np.asarray(home_months, dtype=np.float64).ravel()
    if not fa.shape == op.shape == hm.shape:
        raise ValueError("false_alarms, open and home_months must have one value per home")
    if np.any(fa < 0) or np.any(op < 0) or np.any(hm < 0):
        raise ValueError("counts and monitored time must not be negative")
    none = home_rate(fa, hm, confidence_level=confidence_level, min_homes=min_homes)
    every = home_rate(fa + op, hm, confidence_level=confidence_level, min_homes=min_homes)
    open_count = int(op[hm > 0].sum())

    def result(state: str, reason: str | None, more: float | None = None) -> ReadinessVerdict:
        return ReadinessVerdict(
            state=state,
            reason=reason,
            rule=readiness_rule(confidence_level),
            target=target,
            confidence_level=confidence_level,
            homes=none.homes,
            home_months=none.home_months,
            false_alarms=none.events,
            open_count=open_count,
            unusable=int(unusable),
            estimate_none=none.estimate,
            low_none=none.low,
            high_none=none.high,
            estimate_all=every.estimate,
            low_all=every.low,
            high_all=every.high,
            more_home_months=more,
            method=METHOD,
        )

    if none.reason is not None:
        return result("not_yet_shown", none.reason)
    if every.high <= target:
        return result("met", None, 0.0)
    if none.low > target:
        return result("not_met", None)
    if none.high <= target:
        return result("not_yet_shown", AWAITING_REVIEW)
    if not every.estimate < target:
        return result("not_yet_shown", RATE_NOT_BELOW_TARGET)
    return result("not_yet_shown", MORE_TIME_NEEDED, _more_home_months(every, target))
