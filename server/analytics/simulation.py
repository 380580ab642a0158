"""Seeded pilots from known truth, and how often the summary's figures get them right.

Pure: every draw comes from the `numpy.random.Generator` passed in. The evaluation calls the same
functions the weekly summary uses (`homerate`, `compare`, `shares`), never a second formula.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from server.analytics import compare, homerate, shares

ROOMS = ("kitchen", "hallway", "bedroom", "living room")
MODELS = ("model-a", "model-b")


@dataclass(frozen=True)
class PilotSpec:
    """One kind of invented pilot.

    homes: number of homes; shape: gamma shape of the homes' rates around `rate` (None: every home
    exactly at `rate`); rate: the true mean false-alarm rate per device-month; months: how long each
    device listens (each device listens between 60% and 100% of it); devices: fewest and most
    devices per home; open_share: chance that a false alarm still awaits review (or was marked
    unsure); switch_share: share of homes whose devices change firmware at a random point;
    firmware_effect: the new firmware's rate over the old one's (1: no effect).
    """

    homes: int
    shape: float | None = 0.5
    rate: float = 1.0
    months: float = 2.0
    devices: tuple[int, int] = (1, 3)
    open_share: float = 0.0
    switch_share: float = 0.7
    firmware_effect: float = 1.0


@dataclass(frozen=True)
class Pilot:
    """`rows`: one per device-window (home_code, device, firmware, model, room, false_alarms, open,
    home_months); `homes`: per home (home_code, false_alarms, open, home_months, true_rate)."""

    rows: pd.DataFrame
    homes: pd.DataFrame


def simulate_pilot(rng: np.random.Generator, spec: PilotSpec) -> Pilot:
    """One pilot drawn from `spec`."""
    g = spec.homes
    if spec.shape is None:
        home_rate = np.full(g, spec.rate)
    else:
        home_rate = rng.gamma(spec.shape, spec.rate / spec.shape, size=g)
    n_dev = rng.integers(spec.devices[0], spec.devices[1] + 1, size=g)
    home_idx = np.repeat(np.arange(g), n_dev)
    d = len(home_idx)
    listen = spec.months * rng.uniform(0.6, 1.0, size=d)
    switches = rng.random(g) < spec.switch_share
    cut = rng.uniform(0.2, 0.8, size=g)[home_idx]
    # Windows: before and after the firmware change (devices of homes that never switch: one window).
    switched = switches[home_idx]
    before = np.where(switched, listen * cut, listen)
    after = np.where(switched, listen * (1 - cut), 0.0)
    dev = np.arange(d)
    rows = pd.DataFrame(
        {
            "home_idx": np.concatenate([home_idx, home_idx]),
            "device": np.concatenate([dev, dev]),
            "firmware": np.array(["1.0"] * d + ["1.1"] * d, dtype=object),
            "home_months": np.concatenate([before, after]),
        }
    )
    rows = rows[rows["home_months"] > 0].reset_index(drop=True)
    model = rng.integers(0, len(MODELS), size=g)
    room = rng.integers(0, len(ROOMS), size=d)
    mean = home_rate[rows["home_idx"].to_numpy()] * rows["home_months"].to_numpy()
    mean = np.where(rows["firmware"].to_numpy() == "1.1", mean * spec.firmware_effect, mean)
    events = rng.poisson(mean)
    open_ = rng.binomial(events, spec.open_share)
    rows = rows.assign(
        home_code=[f"H{i:03d}" for i in rows["home_idx"]],
        model=np.array(MODELS, dtype=object)[model[rows["home_idx"].to_numpy()]],
        room=np.array(ROOMS, dtype=object)[room[rows["device"].to_numpy()]],
        false_alarms=events - open_,
        open=open_,
    )
    per = rows.groupby("home_idx")[["false_alarms", "open", "home_months"]].sum()
    per = per.reindex(np.arange(g), fill_value=0)
    homes = pd.DataFrame(
        {
            "home_code": [f"H{i:03d}" for i in range(g)],
            "false_alarms": per["false_alarms"].to_numpy(dtype=np.int64),
            "open": per["open"].to_numpy(dtype=np.int64),
            "home_months": per["home_months"].to_numpy(dtype=np.float64),
            "true_rate": home_rate,
        }
    )
    cols = ["home_code", "device", "firmware", "model", "room", "false_alarms", "open", "home_months"]
    return Pilot(rows=rows[cols], homes=homes)


# ---------------------------------------------------------------------------------------
# Checks: each returns True/False for one pilot (a success for coverage, a flag otherwise)


def covers(pilot: Pilot, spec: PilotSpec, level: float = 0.95) -> bool:
    """The home-level interval (none open) contains the true mean rate."""
    h = pilot.homes
    r = homerate.home_rate(h["false_alarms"] + h["open"], h["home_months"], confidence_level=level)
    return bool(r.low <= spec.rate <= r.high)


def met(pilot: Pilot, spec: PilotSpec) -> bool:
    """Readiness says "met" (the truth is set by the spec: at the target means it should not)."""
    h = pilot.homes
    v = homerate.readiness_verdict(h["false_alarms"], h["open"], h["home_months"], spec.rate)
    return v.state == "met"


def firmware_differs(pilot: Pilot, spec: PilotSpec) -> bool:
    rows = pilot.rows.assign(false_alarms=pilot.rows["false_alarms"] + pilot.rows["open"])
    return compare.compare_pair(rows, "1.1", "1.0").differs


def model_differs(pilot: Pilot, spec: PilotSpec) -> bool:
    rows = pilot.rows.assign(false_alarms=pilot.rows["false_alarms"] + pilot.rows["open"])
    return compare.compare_groups(rows, key="model").differs


def room_differs(pilot: Pilot, spec: PilotSpec) -> bool:
    rows = pilot.rows.assign(false_alarms=pilot.rows["false_alarms"] + pilot.rows["open"])
    return compare.compare_groups(rows, key="room").differs


def above_target(pilot: Pilot, spec: PilotSpec) -> bool:
    """At least one home named clearly above a target equal to the true rate."""
    h = pilot.homes.assign(false_alarms=pilot.homes["false_alarms"] + pilot.homes["open"])
    return shares.homes_above_target_adjusted(h, spec.rate).clearly_above > 0


def _concentration(pilot: Pilot) -> shares.ExposureConcentration:
    h = pilot.homes.assign(false_alarms=pilot.homes["false_alarms"] + pilot.homes["open"])
    seed = int(h["false_alarms"].sum()) * 7919 + len(h)
    return shares.exposure_concentration(h, rng=np.random.default_rng(seed), draws=400)


def beyond_chance(pilot: Pilot, spec: PilotSpec) -> bool:
    return _concentration(pilot).beyond_chance


def stands_out(pilot: Pilot, spec: PilotSpec) -> bool:
    return len(_concentration(pilot).stands_out_codes) > 0


@dataclass(frozen=True)
class Check:
    """One line of the study: what is measured, under which truth, against which goal."""

    name: str
    measure: str  # "coverage" (want >= goal), "flag rate" (want <= goal) or "power" (shown only)
    spec: PilotSpec
    run: Callable[[Pilot, PilotSpec], bool]
    goal: float
    note: str = field(default="")


def study_checks() -> list[Check]:
    """The checks of the study (the issue's acceptance targets)."""
    checks: list[Check] = []
    for homes, goal in ((10, 0.92), (40, 0.94)):
        for shape in (0.5, 2.0):
            checks.append(
                Check(
                    f"home-level 95% interval, {homes} homes, gamma shape {shape:g}",
                    "coverage",
                    PilotSpec(homes=homes, shape=shape),
                    covers,
                    goal,
                )
            )
    for homes, goal in ((10, 0.92), (40, 0.94)):
        for rate in (0.3, 3.0):
            checks.append(
                Check(
                    f"home-level 95% interval, {homes} homes, gamma shape 0.5, {rate:g} false alarms a month",
                    "coverage",
                    PilotSpec(homes=homes, shape=0.5, rate=rate),
                    covers,
                    goal,
                )
            )
    for homes in (10, 40):
        checks.append(
            Check(
                f'readiness "met" with true rate = target, {homes} homes, 20% of false alarms open',
                "flag rate",
                PilotSpec(homes=homes, shape=0.5, open_share=0.2),
                met,
                0.03,
            )
        )
    for homes in (10, 40):
        for shape in (0.5, 2.0):
            checks.append(
                Check(
                    f'firmware "differs", no real effect, {homes} homes, shape {shape:g}',
                    "flag rate",
                    PilotSpec(homes=homes, shape=shape),
                    firmware_differs,
                    0.06,
                )
            )
    for homes in (10, 40):
        checks.append(
            Check(
                f'hardware model "differs", no real effect, {homes} homes, shape 0.5',
                "flag rate",
                PilotSpec(homes=homes, shape=0.5),
                model_differs,
                0.06,
            )
        )
        checks.append(
            Check(
                f'room "differs", no real effect, {homes} homes, shape 0.5',
                "flag rate",
                PilotSpec(homes=homes, shape=0.5),
                room_differs,
                0.06,
            )
        )
    for homes in (10, 40):
        checks.append(
            Check(
                f'firmware "differs", new firmware doubles every home\'s rate, {homes} homes, shape 0.5',
                "power",
                PilotSpec(homes=homes, shape=0.5, firmware_effect=2.0),
                firmware_differs,
                float("nan"),
            )
        )
    for homes in (10, 40):
        equal = PilotSpec(homes=homes, shape=None)
        checks.append(
            Check(
                f'"clearly above target", every home at target, {homes} homes',
                "flag rate",
                equal,
                above_target,
                0.06,
            )
        )
        checks.append(
            Check(
                f'concentration "beyond chance", equal rates, {homes} homes',
                "flag rate",
                equal,
                beyond_chance,
                0.06,
            )
        )
        checks.append(
            Check(f'a home "stands out", equal rates, {homes} homes', "flag rate", equal, stands_out, 0.06)
        )
    return checks


@dataclass(frozen=True)
class Outcome:
    name: str
    measure: str
    goal: float
    pilots: int
    value: float
    monte_carlo_se: float
    passed: bool


def run_check(check: Check, rng: np.random.Generator, pilots: int) -> Outcome:
    """Run one check over `pilots` seeded pilots."""
    hits = sum(check.run(simulate_pilot(rng, check.spec), check.spec) for _ in range(pilots))
    value = hits / pilots
    se = float(np.sqrt(max(value * (1 - value), 1e-12) / pilots))
    if check.measure == "coverage":
        passed = value >= check.goal
    elif check.measure == "flag rate":
        passed = value <= check.goal
    else:
        passed = True
    return Outcome(check.name, check.measure, check.goal, pilots, value, se, bool(passed))


def run_study(rng: np.random.Generator, pilots: int, checks: list[Check] | None = None) -> pd.DataFrame:
    """Every check over `pilots` pilots each; one row per check."""
    out = [run_check(c, rng, pilots) for c in (checks if checks is not None else study_checks())]
    return pd.DataFrame([o.__dict__ for o in out])
