"""Home-months over a seeded demo pilot (SQLite), whose households include two-device homes.

Each home's monitored time in the summary is checked against a plain loop over its devices'
listening segments, clipped to the monitored windows and merged per home.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.analytics import load, rates, weekly
from server.db import make_engine, make_session_factory
from server.demo import scenario, seed
from server.devices.models import ListeningSegment
from server.trials import service as trials_service

SMALL = {"homes": 18, "weeks": 2, "seed": 5}
STARTS_ON = dt.date(2026, 3, 2)  # a Monday


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> seed.SeedResult:
    return seed.seed_demo(Path(tmp_path_factory.mktemp("demo-homes")), starts_on=STARTS_ON, **SMALL)


@pytest.fixture
def db(seeded: seed.SeedResult) -> Iterator[Session]:
    engine = make_engine(seeded.settings.resolved_database_url())
    s = make_session_factory(engine)()
    try:
        yield s
    finally:
        s.close()
        engine.dispose()


def _union_s(pieces: list[tuple[float, float]]) -> float:
    total, end = 0.0, float("-inf")
    for a, b in sorted(pieces):
        if b <= end:
            continue
        total += b - max(a, end)
        end = b
    return total


def test_demo_homes_count_each_monitored_hour_once(seeded: seed.SeedResult, db: Session) -> None:
    now = seeded.plan.end + dt.timedelta(hours=1)
    summary = weekly.build_summary(db, trial_code=scenario.TRIAL_CODE, now=now)
    trial = trials_service.get_trial(db, scenario.TRIAL_CODE)
    data = load.load_pilot(db, trial, summary.week, now=now, staged_tolerance_s=summary.staged_tolerance_s)
    windows = data.windows
    segments = db.execute(
        select(ListeningSegment.device_id, ListeningSegment.started_at, ListeningSegment.ended_at)
    ).all()
    per_home: dict[int, list[tuple[float, float]]] = {}
    device_s: dict[int, float] = {}
    for w in windows.itertuples():
        ws, we = w.started_at.timestamp(), w.ended_at.timestamp()
        for device_id, a, b in segments:
            if device_id != w.device_id:
                continue
            lo, hi = max(a.timestamp(), ws), min(b.timestamp(), we)
            if hi > lo:
                per_home.setdefault(int(w.home_id), []).append((lo, hi))
                device_s[int(w.home_id)] = device_s.get(int(w.home_id), 0.0) + hi - lo
    codes = dict(zip(data.homes["home_id"], data.homes["home_code"], strict=True))
    expected = {codes[h]: _union_s(p) / rates.HOME_MONTH_S for h, p in per_home.items()}

    smoke = next(c for c in summary.classes if c.sound_class == "smoke_alarm").to_date
    got = dict(zip(smoke.homes["home_code"], smoke.homes["home_months"], strict=True))
    assert {c for c, v in got.items() if v > 0} == set(expected)
    for code, hm in expected.items():
        assert got[code] == pytest.approx(hm, rel=1e-6, abs=1e-9), code
    # The demo has homes with two devices whose listening overlaps: there the sum of the devices'
    # time is more than the home's, and the summary's total is the homes' time, not the devices'.
    doubled = [codes[h] for h in per_home if device_s[h] > _union_s(per_home[h]) * 1.2]
    assert doubled, "the demo should have a two-device home"
    assert smoke.home_months == pytest.approx(sum(expected.values()), rel=1e-6)
    assert smoke.device_months == pytest.approx(sum(device_s.values()) / rates.HOME_MONTH_S, rel=1e-6)
    assert smoke.device_months > smoke.home_months * 1.05


def test_the_note_on_homes_matches_the_intervals_it_explains(seeded: seed.SeedResult, db: Session) -> None:
    # The note under each home-level interval says whether it is close to the exact one; it must
    # agree with the two intervals printed beside it (a sparse week once said "close" beside an
    # upper end twice the exact one).
    now = seeded.plan.end + dt.timedelta(hours=1)
    summary = weekly.build_summary(db, trial_code=scenario.TRIAL_CODE, now=now)
    notes = 0
    for c in summary.classes:
        for f in (c.week, c.to_date):
            if f.homes_note is None:
                continue
            notes += 1
            wide = f.home_rate.high > 1.25 * f.disturbance_rate.high
            assert ("are close" in f.homes_note) == (not wide and "not alike" not in f.homes_note), (
                f.sound_class,
                f.scope,
                f.homes_note,
                f.home_rate.high,
                f.disturbance_rate.high,
            )
            if "reaches higher" in f.homes_note:
                assert (
                    wide
                    and f"{f.home_rate.events} false alarms over {f.home_rate.homes} homes" in f.homes_note
                )
    assert notes >= 2
