"""Readiness must not call a target met when only the Poisson interval (homes assumed alike) meets it."""

import pytest

from server.analytics import rates


def test_met_by_poisson_but_not_by_home_bootstrap_is_not_yet_shown():
    # 62 false alarms in 83.5 home-months: exact 95% upper 0.952 (chi2(0.975; 126)/2 / 83.5,
    # the Garwood limit of checks.md section 1), below a target of 1.0.
    plain = rates.readiness(62, 83.5, 1.0)
    assert plain.state == "met"
    assert plain.high == pytest.approx(0.952, abs=0.0005)
    homes = rates.readiness(62, 83.5, 1.0, home_bootstrap_high=1.732)
    assert homes.state == "not_yet_shown"
    assert homes.reason == rates.HOMES_DIFFER
    assert homes.more_home_months is None


def test_met_by_both_limits_stays_met():
    r = rates.readiness(62, 83.5, 1.0, home_bootstrap_high=0.98)
    assert r.state == "met" and r.reason is None


def test_bootstrap_limit_does_not_rescue_a_missed_target():
    # 30 in 10 home-months: exact lower limit 2.024 > 1 (Garwood, checks.md section 1 method).
    r = rates.readiness(30, 10.0, 1.0, home_bootstrap_high=0.5)
    assert r.state == "not_met"
