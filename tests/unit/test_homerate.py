"""Home-level rate interval and the one readiness rule."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from server.analytics import homerate, rates


def test_interval_never_narrower_than_exact_poisson():
    # Homes alike (equal counts per month): the clustered spread is tiny, so the exact interval
    # rules. 5 events in 25 home-months: 0.064939-0.466733 (checks.md section 1, derived from
    # Garwood 1936; recomputed with scipy chi2 there).
    r = homerate.home_rate([1, 1, 1, 1, 1, 0, 0, 0, 0, 0], [2.5] * 10)
    assert r.estimate == pytest.approx(0.2)
    assert r.low <= 0.064939 + 1e-6
    assert r.high >= 0.466733 - 1e-6
    alike = homerate.home_rate([2] * 12, [1.0] * 12)
    exact = rates.poisson_rate(24, 12.0)
    assert alike.low <= exact.low and alike.high >= exact.high
    # Counting alone sets the spread (dispersion 1): the log-t interval on Poisson se = 1 / sqrt(24).
    assert alike.dispersion == pytest.approx(1.0)
    c = stats.t.ppf(0.975, 11)
    assert alike.high == pytest.approx(max(2.0 * math.exp(c / math.sqrt(24)), exact.high))


def test_zero_events_give_zero_lower_and_exact_upper():
    # 0 events: upper 3.688879 / T (checks.md section 1, Garwood 1936, from memory).
    r = homerate.home_rate([0] * 10, [2.0] * 10)
    assert r.low == 0.0
    assert r.high == pytest.approx(3.688879 / 20.0, rel=1e-6)
    assert r.high > 0


def test_too_few_homes_gives_a_reason_not_an_interval():
    r = homerate.home_rate([3, 0, 9], [1.0, 1.0, 1.0])
    assert r.reason == homerate.TOO_FEW_HOMES
    assert math.isnan(r.low) and math.isnan(r.high)
    assert r.estimate == pytest.approx(4.0)
    # Homes without monitored time do not count towards the minimum.
    r = homerate.home_rate([1] * 10 + [0], [1.0] * 9 + [0.0, 0.0])
    assert r.homes == 9 and r.reason == homerate.TOO_FEW_HOMES
    assert homerate.home_rate([], []).reason == homerate.NO_MONITORED_TIME


def test_log_t_part_matches_hand_computation():
    # With no skew in the homes' residuals the interval is r exp(+-t_{G-1} se / r), se from the
    # CR3-scaled residuals (formula in the docstring), worked here by hand with scipy's t quantile.
    x = np.array([0, 4, 0, 4, 0, 4, 0, 4, 0, 4, 0, 4], dtype=float)
    t = np.ones(12)
    r = x.sum() / t.sum()
    h = t / t.sum()
    se = math.sqrt((((x - r * t) / (1 - h)) ** 2).sum()) / t.sum()
    c = stats.t.ppf(0.975, 11)
    got = homerate.home_rate(x, t)
    assert got.low == pytest.approx(r * math.exp(-c * se / r))
    assert got.high == pytest.approx(r * math.exp(c * se / r))


def test_skewed_homes_widen_the_upper_end_more():
    # One home holds most false alarms: the upper end stretches further than the lower end shrinks.
    x = [0, 0, 1, 0, 0, 1, 0, 0, 12, 0, 1, 0]
    r = homerate.home_rate(x, [1.0] * 12)
    assert r.high / r.estimate > r.estimate / r.low
    assert r.dispersion > 3


def test_one_home_with_half_the_false_alarms_does_not_run_away():
    # 22 of 46 false alarms in one home of 36 (an ordinary pilot with a dog). Hall's inverse has no
    # real root here and, uncapped, put the upper end at 34.4 per home-month; the corrected quantile
    # is held within SKEW_STRETCH x the t quantile (on the log scale), which the simulation study
    # in docs/statistics.md checked for coverage.
    x = [22] + [1] * 24 + [0] * 11
    t = [0.8] * 36
    r = homerate.home_rate(x, t)
    assert r.estimate == pytest.approx(46 / 28.8)
    # By hand: CR3-scaled residuals (docstring formula), log-scale cv, capped quantile 1.5 x t.
    xa, ta = np.array(x, dtype=float), np.array(t)
    est, h = xa.sum() / ta.sum(), ta / ta.sum()
    cv = math.sqrt((((xa - est * ta) / (1 - h)) ** 2).sum()) / ta.sum() / est
    c = stats.t.ppf(0.975, 35)
    assert r.high == pytest.approx(est * math.exp(homerate.SKEW_STRETCH * c * cv))
    assert 4.0 < r.high < 8.0  # 6.76 with the cap; wider than the plain log-t end
    assert r.high > r.estimate * math.exp(c * cv)
    assert r.low == pytest.approx(0.6102737681352293, rel=1e-9)


def test_interval_widens_with_level():
    x, t = [0, 3, 1, 5, 0, 2, 1, 0, 7, 1], [1.0, 2, 1.5, 2, 1, 1, 2, 0.5, 3, 1]
    r90 = homerate.home_rate(x, t, confidence_level=0.90)
    r99 = homerate.home_rate(x, t, confidence_level=0.99)
    assert r99.low < r90.low < r90.estimate < r90.high < r99.high


def test_rule_sentence_names_the_bound():
    assert "97.5%" in homerate.READINESS_RULE and "95%" in homerate.READINESS_RULE
    assert "awaiting review" in homerate.READINESS_RULE
    assert homerate.readiness_verdict([1] * 10, [0] * 10, [2.0] * 10, 5.0).rule == homerate.READINESS_RULE


def test_backlog_blocks_met():
    # 0 false alarms, 40 awaiting review over 20 home-months, target 1 per home-month: not met.
    v = homerate.readiness_verdict([0] * 20, [2] * 20, [1.0] * 20, 1.0)
    assert v.state == "not_yet_shown"
    assert v.reason == homerate.AWAITING_REVIEW
    assert v.open_count == 40
    assert v.estimate_none == 0.0 and v.estimate_all == pytest.approx(2.0)
    assert v.high_none <= 1.0 < v.high_all
    assert "40" in v.reason_text


def test_met_not_met_and_reasons():
    hm = [3.0] * 12
    met = homerate.readiness_verdict([1] * 12, [0] * 12, hm, 2.0, unusable=3)
    assert met.state == "met" and met.reason is None and met.unusable == 3
    assert met.high_all <= 2.0
    not_met = homerate.readiness_verdict([30] * 12, [0] * 12, hm, 2.0)
    assert not_met.state == "not_met" and not_met.low_none > 2.0
    few = homerate.readiness_verdict([0] * 5, [0] * 5, [3.0] * 5, 2.0)
    assert few.state == "not_yet_shown" and few.reason == homerate.TOO_FEW_HOMES
    assert "Too few homes to judge spread" in few.reason_text
    above = homerate.readiness_verdict([3] * 12, [0] * 12, hm, 0.9)
    assert above.state == "not_yet_shown" and above.reason == homerate.RATE_NOT_BELOW_TARGET
    close = homerate.readiness_verdict([1, 2, 0, 1, 1, 2, 0, 1, 1, 0, 2, 1], [0] * 12, hm, 0.5)
    assert close.state == "not_yet_shown" and close.reason == homerate.MORE_TIME_NEEDED
    assert close.more_home_months is not None and close.more_home_months > 0
    # With that much more time at the same rate and spread, the log-t bound reaches the target.
    extra = close.more_home_months
    phi, r, homes = close_dispersion(close), close.estimate_all, close.homes
    c = stats.t.ppf(0.975, homes - 1)
    total = close.home_months + extra
    assert r * math.exp(c * math.sqrt(phi / (r * total))) == pytest.approx(0.5, rel=1e-6)


def close_dispersion(v: homerate.ReadinessVerdict) -> float:
    return homerate.home_rate([1, 2, 0, 1, 1, 2, 0, 1, 1, 0, 2, 1], [3.0] * 12).dispersion


def test_bad_input_is_refused():
    with pytest.raises(ValueError):
        homerate.readiness_verdict([1], [0], [1.0], 0.0)
    with pytest.raises(ValueError):
        homerate.readiness_verdict([1, 2], [0], [1.0, 1.0], 1.0)
    with pytest.raises(ValueError):
        homerate.readiness_verdict([-1], [0], [1.0], 1.0)
    with pytest.raises(ValueError):
        homerate.home_rate([1, 2], [1.0, 1.0], confidence_level=1.0)
