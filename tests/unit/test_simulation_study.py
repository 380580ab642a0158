"""A fast seeded subset of the simulation study (the full one: tests/benchmarks/sim_study.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from server.analytics import simulation


def _check(fragment: str) -> simulation.Check:
    (check,) = [c for c in simulation.study_checks() if c.name.startswith(fragment)]
    return check


def test_pilots_are_seeded_and_carry_the_truth():
    spec = simulation.PilotSpec(homes=12, open_share=0.3)
    a = simulation.simulate_pilot(np.random.default_rng(5), spec)
    b = simulation.simulate_pilot(np.random.default_rng(5), spec)
    assert a.rows.equals(b.rows) and a.homes.equals(b.homes)
    assert len(a.homes) == 12
    assert set(a.rows["firmware"]) <= {"1.0", "1.1"}
    # Per-home totals are the sums of the device windows.
    sums = a.rows.groupby("home_code")[["false_alarms", "open", "home_months"]].sum()
    h = a.homes.set_index("home_code").loc[sums.index]
    assert (h["false_alarms"] == sums["false_alarms"]).all() and (h["open"] == sums["open"]).all()
    assert h["home_months"].to_numpy() == pytest.approx(sums["home_months"].to_numpy())
    # Every home at the target when shape is None.
    flat = simulation.simulate_pilot(np.random.default_rng(1), simulation.PilotSpec(homes=5, shape=None))
    assert (flat.homes["true_rate"] == 1.0).all()


@pytest.mark.parametrize(
    ("fragment", "pilots"),
    [
        ("home-level 95% interval, 10 homes, gamma shape 0.5, 3 false alarms", 300),
        ('readiness "met" with true rate = target, 10 homes', 300),
        ('firmware "differs", no real effect, 40 homes, shape 2', 150),
        ('"clearly above target", every home at target, 40 homes', 200),
    ],
)
def test_study_targets_hold_on_a_seeded_subset(fragment, pilots):
    check = _check(fragment)
    out = simulation.run_check(check, np.random.default_rng(20261203), pilots)
    # Monte Carlo tolerance: two binomial standard errors at the goal.
    slack = 2 * math.sqrt(check.goal * (1 - check.goal) / pilots)
    if check.measure == "coverage":
        assert out.value >= check.goal - slack
    else:
        assert out.value <= check.goal + slack
