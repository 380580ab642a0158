"""Home-months, disturbances and readiness over both backends.

Scenario: an invented pilot in the hill village of Pellowick (trial PELL-2, UTC) that starts on
Monday 2026-08-03; the reported week is 2026-W40 (Monday 28 September to Monday 5 October).
"""

from __future__ import annotations

import csv
import datetime as dt
import io

import numpy as np
import pytest
from sqlalchemy.orm import Session

from server.analytics import homerate, rates, report, simulation, weekly
from server.devices.models import ListeningSegment
from server.households import service as households_service
from tests import factories

UTC = dt.UTC
WEEK = "2026-W40"
W0 = dt.datetime(2026, 9, 28, tzinfo=UTC)
W1 = W0 + dt.timedelta(days=7)
NOW = W1 + dt.timedelta(days=1, hours=6)
HM = rates.HOME_MONTH_S
MONTH = dt.timedelta(seconds=HM)
DAY = 86400.0


@pytest.fixture
def pell(session: Session):  # type: ignore[no-untyped-def]
    return factories.make_trial(
        session, code="PELL-2", name="Pellowick pilot", starts_on=dt.date(2026, 8, 3), timezone="UTC"
    )


def listen(session: Session, device, start: dt.datetime, end: dt.datetime) -> None:  # type: ignore[no-untyped-def]
    session.add(ListeningSegment(device_id=device.id, started_at=start, ended_at=end, is_open=False))
    session.flush()


def home_with(session: Session, trial, devices: int = 1, rooms=("kitchen", "hallway", "landing")):  # type: ignore[no-untyped-def]
    """A home active from 3 August with `devices` devices installed in it."""
    start = dt.datetime(2026, 8, 3, 9, tzinfo=UTC)
    first, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, first, installed_at=start, room=rooms[0])
    out = [first]
    for n in range(1, devices):
        d, _ = factories.make_device(session, trial)
        households_service.install_device(session, home=home, device=d, room=rooms[n], installed_at=start)
        out.append(d)
    return home, out


def alert(session, store, settings, device, when, label="false_alarm", cls="smoke_alarm"):  # type: ignore[no-untyped-def]
    a = factories.make_alert(
        session,
        store,
        settings,
        device,
        sound_class=cls,
        detected_at=when,
        now=when + dt.timedelta(minutes=1),
    )
    if label is not None:
        a.state, a.final_label, a.final_method = "final", label, "single"
        if label == "false_alarm":
            a.final_cause, a.final_resemblance = "dog", "unrelated"
    session.flush()
    return a


def build(session: Session, week: str = WEEK) -> weekly.WeeklySummary:
    return weekly.build_summary(session, trial_code="PELL-2", now=NOW, week=week)


def smoke(summary: weekly.WeeklySummary, scope: str = "to_date") -> weekly.ClassFigures:
    cs = next(c for c in summary.classes if c.sound_class == "smoke_alarm")
    return cs.to_date if scope == "to_date" else cs.week


def row(frame, code: str) -> dict:  # type: ignore[no-untyped-def,type-arg]
    return frame[frame["home_code"] == code].iloc[0].to_dict()


# ---------------------------------------------------------------------------------------


def test_two_devices_listening_through_one_month_give_one_home_month(session, pell):  # type: ignore[no-untyped-def]
    home, (a, b) = home_with(session, pell, devices=2)
    start = dt.datetime(2026, 8, 31, tzinfo=UTC)
    for d in (a, b):
        listen(session, d, start, start + MONTH)
    f = smoke(build(session))
    assert f.home_months == pytest.approx(1.0, rel=1e-9)
    assert f.device_months == pytest.approx(2.0, rel=1e-9)
    assert row(f.homes, home.code)["home_months"] == pytest.approx(1.0, rel=1e-9)
    # Device properties stay per device-month: each room has its device's whole month.
    rooms = next(x for x in f.breakdowns if x.dimension == "room").table
    assert dict(zip(rooms["room"], rooms["device_months"], strict=True)) == {
        "kitchen": pytest.approx(1.0, rel=1e-9),
        "hallway": pytest.approx(1.0, rel=1e-9),
    }
    # The month ends on Wednesday 30 September at 10:30: 2 days 10.5 hours of it fall in the week.
    w = smoke(build(session), "week")
    assert w.home_months == pytest.approx((2 * DAY + 10.5 * 3600) / HM, rel=1e-9)
    assert w.device_months == pytest.approx(2 * (2 * DAY + 10.5 * 3600) / HM, rel=1e-9)


def test_partly_overlapping_devices_give_the_union_week_by_week(session, pell):  # type: ignore[no-untyped-def]
    home, (a, b) = home_with(session, pell, devices=2)
    single, (c,) = home_with(session, pell)
    aug31 = dt.datetime(2026, 8, 31, tzinfo=UTC)
    listen(session, a, aug31, aug31 + dt.timedelta(days=15))  # 31 Aug - 15 Sep
    listen(session, b, aug31 + dt.timedelta(days=10), aug31 + dt.timedelta(days=30))  # 10 - 30 Sep
    # Device a listens again inside b's stretch: no extra home time.
    listen(session, a, aug31 + dt.timedelta(days=20), aug31 + dt.timedelta(days=21))
    listen(session, c, aug31, aug31 + dt.timedelta(days=7))
    s = build(session)
    f = smoke(s)
    assert row(f.homes, home.code)["home_months"] == pytest.approx(30 * DAY / HM, rel=1e-9)
    assert row(f.homes, single.code)["home_months"] == pytest.approx(7 * DAY / HM, rel=1e-9)
    assert f.home_months == pytest.approx(37 * DAY / HM, rel=1e-9)
    assert f.device_months == pytest.approx((15 + 20 + 1 + 7) * DAY / HM, rel=1e-9)
    # Week by week (ISO weeks from Monday 31 August): the home is monitored every day of W36-W39
    # and the single-device home in W36; W40 starts on 28 September, two days before b stops.
    trend = next(c for c in s.classes if c.sound_class == "smoke_alarm").trend.set_index("week")
    assert trend.loc["2026-W36", "home_months"] == pytest.approx(14 * DAY / HM, rel=1e-9)
    assert trend.loc["2026-W38", "home_months"] == pytest.approx(7 * DAY / HM, rel=1e-9)
    assert trend.loc["2026-W40", "home_months"] == pytest.approx(2 * DAY / HM, rel=1e-9)
    assert trend["home_months"].sum() == pytest.approx(37 * DAY / HM, rel=1e-9)


def test_alerts_of_one_sound_from_one_home_are_one_disturbance(session, store, settings, pell):  # type: ignore[no-untyped-def]
    home, (a, b) = home_with(session, pell, devices=2)
    other, (c,) = home_with(session, pell)
    for d in (a, b, c):
        listen(session, d, W0 - dt.timedelta(days=1), W1)
    t = W0 + dt.timedelta(days=1, hours=3)
    alert(session, store, settings, a, t)  # two devices, one kettle: one false-alarm disturbance
    alert(session, store, settings, b, t + dt.timedelta(seconds=6))
    t2 = W0 + dt.timedelta(days=2)
    alert(session, store, settings, a, t2, label="false_alarm")  # one confirmed, one false alarm:
    alert(session, store, settings, b, t2 + dt.timedelta(seconds=20), label="confirmed")  # confirmed
    t3 = W0 + dt.timedelta(days=3)
    alert(session, store, settings, a, t3, label=None)  # awaiting review, with an unusable beside it
    alert(session, store, settings, b, t3 + dt.timedelta(seconds=30), label="unusable")
    t4 = W0 + dt.timedelta(days=4)
    alert(session, store, settings, a, t4)  # 61 s apart: two disturbances
    alert(session, store, settings, b, t4 + dt.timedelta(seconds=61))
    alert(session, store, settings, c, t + dt.timedelta(seconds=2))  # another home: its own
    alert(session, store, settings, b, t + dt.timedelta(seconds=3), cls="baby_cry")  # another class

    f = smoke(build(session), "week")
    assert f.alerts.false_alarm == 6 and f.alerts.confirmed == 1 and f.alerts.pending == 1
    assert f.alerts.unusable == 1
    d = f.disturbances
    assert (d.false_alarm, d.confirmed, d.pending, d.unsure, d.unusable, d.alerts) == (4, 1, 1, 0, 0, 9)
    assert d.window_s == 60.0
    assert f.disturbance_rate.events == 4 and f.rate.events == 6
    h = row(f.homes, home.code)
    assert (h["disturbances"], h["false_alarms"], h["open_disturbances"]) == (3, 5, 1)
    assert row(f.homes, other.code)["disturbances"] == 1
    assert f.readiness.open_count == 1 and f.readiness.unusable == 1
    assert f.readiness.false_alarms == 4


def test_a_wider_window_is_a_trial_setting(session, store, settings, pell):  # type: ignore[no-untyped-def]
    pell.disturbance_window_s = 120.0
    session.flush()
    home, (a, b) = home_with(session, pell, devices=2)
    for d in (a, b):
        listen(session, d, W0, W1)
    t = W0 + dt.timedelta(days=4)
    alert(session, store, settings, a, t)
    alert(session, store, settings, b, t + dt.timedelta(seconds=61))
    s = build(session)
    f = smoke(s, "week")
    assert f.disturbances.false_alarm == 1 and f.disturbances.window_s == 120.0
    assert any("120 s" in line for line in s.definitions)


def test_readiness_counts_the_review_backlog_and_judges_over_homes(session, store, settings, pell):  # type: ignore[no-untyped-def]
    """Twelve unlike homes, two with two devices; one alert still awaits review, one is unsure."""
    homes = []
    for n in range(12):
        home, devices = home_with(session, pell, devices=2 if n < 2 else 1)
        for d in devices:
            listen(session, d, W0 - dt.timedelta(days=21), W1)  # four weeks
        homes.append((home, devices))
    busy_home, (busy, busy_2) = homes[0]
    base = W0 - dt.timedelta(days=20)
    for k in range(5):  # the busy home: 5 disturbances of 2 alerts each
        alert(session, store, settings, busy, base + dt.timedelta(days=k))
        alert(session, store, settings, busy_2, base + dt.timedelta(days=k, seconds=4))
    alert(session, store, settings, homes[3][1][0], base + dt.timedelta(days=2))
    alert(session, store, settings, homes[4][1][0], base + dt.timedelta(days=3), label=None)
    alert(session, store, settings, homes[5][1][0], base + dt.timedelta(days=4), label="unsure")
    alert(session, store, settings, homes[6][1][0], base + dt.timedelta(days=5), label="unusable")

    s = build(session)
    f = smoke(s)
    month = 28 * DAY / HM
    assert f.home_months == pytest.approx(12 * month, rel=1e-9)
    assert f.device_months == pytest.approx(14 * month, rel=1e-9)
    assert f.rate.events == 11 and f.disturbance_rate.events == 6
    fa = np.zeros(12)
    fa[0], fa[3] = 5, 1
    opened = np.zeros(12)
    opened[4] = opened[5] = 1
    expected = homerate.readiness_verdict(fa, opened, np.full(12, month), 1.0, unusable=1)
    r = f.readiness
    assert (r.state, r.reason) == (expected.state, expected.reason)
    assert r.high_none == pytest.approx(expected.high_none, rel=1e-9)
    assert r.high_all == pytest.approx(expected.high_all, rel=1e-9)
    assert (r.open_count, r.unusable, r.false_alarms, r.homes) == (2, 1, 6, 12)
    # 6 of 12 home-months is 0.5 per home-month; with the two open ones 0.667, and the busy home
    # makes homes unlike: the target of 1 is not yet shown.
    assert r.estimate_none == pytest.approx(6 / (12 * month), rel=1e-9)
    assert r.estimate_all == pytest.approx(8 / (12 * month), rel=1e-9)
    assert r.state == "not_yet_shown" and r.reason == "more_time_needed"
    assert f.home_rate.homes == 12 and f.home_rate.reason is None and f.home_rate.low < f.home_rate.high
    assert r.rule == homerate.READINESS_RULE
    # The page gives the range the backlog leaves, and the unusable clip, beside the verdict.
    text = report.open_range_text(r, f.alerts.pending + f.alerts.unsure)
    assert text is not None and text.startswith(
        "Not yet shown: 2 alerts await review or were marked unsure (2 disturbances). Counting none of "
        f"them as false alarms: {6 / (12 * month):.3f} per home-month"
    )
    assert f"counting all of them: {8 / (12 * month):.3f}" in text
    html = report.standalone_html(s)
    assert text in html.replace("&#39;", "'") and "Unusable clips: <strong>1</strong>" in html


def test_summary_json_csv_and_page_say_which_figures_are_per_device(
    session, store, settings, pell, staff_client, app
):  # type: ignore[no-untyped-def]
    app.state.clock = lambda: NOW
    lead = staff_client("lead")
    home, (a, b) = home_with(session, pell, devices=2)
    for d in (a, b):
        listen(session, d, W0, W1)
    alert(session, store, settings, a, W0 + dt.timedelta(days=1))
    alert(session, store, settings, b, W0 + dt.timedelta(days=1, seconds=3))
    js = lead.get(f"/api/v1/trials/PELL-2/summary?week={WEEK}").json()
    f = next(c for c in js["classes"] if c["sound_class"] == "smoke_alarm")["week"]
    assert f["home_months"] == pytest.approx(7 * DAY / HM) and f["device_months"] == pytest.approx(
        14 * DAY / HM
    )
    room = next(x for x in f["breakdowns"] if x["dimension"] == "room")["table"]
    assert {r["room"]: r["device_months"] for r in room} == {
        "kitchen": pytest.approx(7 * DAY / HM),
        "hallway": pytest.approx(7 * DAY / HM),
    }
    assert f["disturbance_rate"]["events"] == 1 and f["rate"]["events"] == 2
    assert f["readiness"]["rule"] == homerate.READINESS_RULE
    text = lead.get(f"/api/v1/trials/PELL-2/summary/tables/overview.csv?week={WEEK}").text
    rows = {(r["sound_class"], r["scope"]): r for r in csv.DictReader(io.StringIO(text))}
    ov = rows[("smoke_alarm", WEEK)]
    assert float(ov["home_months"]) == pytest.approx(7 * DAY / HM)
    assert float(ov["device_months"]) == pytest.approx(14 * DAY / HM)
    assert (ov["false_alarms"], ov["false_alarm_disturbances"]) == ("2", "1")
    assert ov["readiness_reason"] == "too_few_homes"
    firmware_csv = lead.get(
        f"/api/v1/trials/PELL-2/summary/tables/smoke_alarm-week-firmware.csv?week={WEEK}"
    ).text
    assert (
        "device_months" in firmware_csv.splitlines()[0] and "home_months" not in firmware_csv.splitlines()[0]
    )
    page = lead.get(f"/summary?trial=PELL-2&week={WEEK}").text
    assert "device-month" in page and "Disturbance" in page
    assert homerate.READINESS_RULE in page.replace("&#39;", "'")
    assert "too few homes to judge spread" in page.lower()


def test_a_simulated_pilot_gives_the_pure_functions_figures(session, store, settings, pell):  # type: ignore[no-untyped-def]
    """Known truth seeded into the database: the summary's figures are the statistics modules'
    figures on the same per-home arrays, so the simulation study applies to the summary."""
    spec = simulation.PilotSpec(
        homes=12, shape=0.5, rate=6.0, months=0.2, devices=(1, 1), open_share=0.3, switch_share=0.0
    )
    pilot = simulation.simulate_pilot(np.random.default_rng(20261203), spec)
    homes = pilot.homes
    seconds = np.round(homes["home_months"].to_numpy() * HM)
    codes = []
    for (_, h), listen_s in zip(homes.iterrows(), seconds, strict=True):
        home, (device,) = home_with(session, pell)
        codes.append(home.code)
        start = W0 - dt.timedelta(days=1)
        listen(session, device, start, start + dt.timedelta(seconds=float(listen_s)))
        n = int(h["false_alarms"] + h["open"])
        for k in range(n):  # spread through the listening, hours apart
            when = start + dt.timedelta(seconds=float(listen_s) * (k + 1) / (n + 1))
            alert(
                session, store, settings, device, when, label="false_alarm" if k < h["false_alarms"] else None
            )
    f = smoke(build(session))
    fa = homes["false_alarms"].to_numpy()
    op = homes["open"].to_numpy()
    hm = seconds / HM
    expected = homerate.readiness_verdict(fa, op, hm, 1.0, unusable=0)
    got = f.readiness
    assert (expected.state, expected.reason) == ("not_yet_shown", "rate_not_below_target")
    assert (got.state, got.reason, got.open_count, got.false_alarms) == (
        expected.state,
        expected.reason,
        expected.open_count,
        expected.false_alarms,
    )
    for name in ("estimate_none", "low_none", "high_none", "estimate_all", "high_all"):
        assert getattr(got, name) == pytest.approx(getattr(expected, name), rel=1e-9), name
    rate = homerate.home_rate(fa, hm)
    assert (f.home_rate.low, f.home_rate.high) == (
        pytest.approx(rate.low, rel=1e-9),
        pytest.approx(rate.high, rel=1e-9),
    )
    # Per home, in the summary's order.
    by_code = dict(zip(codes, zip(fa, op, hm, strict=True), strict=True))
    for r in f.homes.itertuples():
        x, o, t = by_code[r.home_code]
        assert (r.disturbances, r.open_disturbances) == (x, o)
        assert r.home_months == pytest.approx(t, rel=1e-9)
