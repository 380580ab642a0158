"""The weekly summary over both backends: monitored time edge cases, staged matching, API, page, CSV.

Scenario: an invented pilot in the town of Larchmere (trial LARCH-1, UTC), which starts on Monday
2026-09-07; the reported week is 2026-W40 (Monday 28 September to Monday 5 October).
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re

import pytest
from sqlalchemy import func, select, update
from sqlalchemy.orm import Session

from server.analytics import rates, weekly
from server.devices import service as devices_service
from server.devices.models import Alert, FirmwareChange, ListeningSegment
from server.devices.schemas import HeartbeatIn
from server.households import service as households_service
from server.installations import service as installations_service
from server.staged import service as staged_service
from server.trials import service as trials_service
from tests import factories

UTC = dt.UTC
TRIAL_START = dt.date(2026, 9, 7)
WEEK = "2026-W40"
W0 = dt.datetime(2026, 9, 28, tzinfo=UTC)  # Monday 00:00 of the reported week
W1 = W0 + dt.timedelta(days=7)
NOW = W1 + dt.timedelta(days=2, hours=9)  # Wednesday of the next week
HM = rates.HOME_MONTH_S


def at(days: float, hours: float = 0.0, seconds: float = 0.0) -> dt.datetime:
    """A time in the reported week: `days` after its Monday 00:00 UTC."""
    return W0 + dt.timedelta(days=days, hours=hours, seconds=seconds)


@pytest.fixture
def larch(session: Session):  # type: ignore[no-untyped-def]
    return factories.make_trial(
        session, code="LARCH-1", name="Larchmere pilot", starts_on=TRIAL_START, timezone="UTC"
    )


@pytest.fixture
def lead(staff_client, app):  # type: ignore[no-untyped-def]
    app.state.clock = lambda: NOW
    return staff_client("lead")


def listen(session: Session, device, start: dt.datetime, end: dt.datetime) -> None:  # type: ignore[no-untyped-def]
    session.add(ListeningSegment(device_id=device.id, started_at=start, ended_at=end, is_open=False))
    session.flush()


def alert(
    session,
    store,
    settings,
    device,
    when,
    *,
    label="false_alarm",
    cls="smoke_alarm",  # type: ignore[no-untyped-def]
    cause="dog",
    grade="unrelated",
    score=0.9,
):
    a = factories.make_alert(
        session,
        store,
        settings,
        device,
        sound_class=cls,
        detected_at=when,
        score=score,
        now=when + dt.timedelta(minutes=1),
    )
    if label is not None:
        a.state, a.final_label, a.final_method = "final", label, "single"
        if label == "false_alarm":
            a.final_cause, a.final_resemblance = cause, grade
    session.flush()
    return a


def installed(session, trial, *, since=TRIAL_START, room="kitchen"):  # type: ignore[no-untyped-def]
    """A device installed in a new active home from the trial's first day."""
    device, _ = factories.make_device(session, trial)
    start = dt.datetime.combine(since, dt.time(9), UTC)
    home = factories.make_installed_home(session, trial, device, installed_at=start, room=room)
    return device, home


def summary(lead, week: str = WEEK) -> dict:  # type: ignore[no-untyped-def,type-arg]
    r = lead.get(f"/api/v1/trials/LARCH-1/summary?week={week}")
    assert r.status_code == 200, r.text
    return r.json()


def figures(js: dict, cls: str = "smoke_alarm", scope: str = "week") -> dict:  # type: ignore[type-arg]
    return next(c for c in js["classes"] if c["sound_class"] == cls)[scope]


def homes_of(f: dict) -> dict[str, dict]:  # type: ignore[type-arg]
    return {h["home_code"]: h for h in f["homes"]}


# ---------------------------------------------------------------------------------------


def test_rate_per_home_month_with_exact_and_bootstrap_intervals(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    d1, h1 = installed(session, larch)
    d2, h2 = installed(session, larch)
    for d in (d1, d2):
        listen(session, d, W0 - dt.timedelta(days=1), W1 + dt.timedelta(days=1))
    for k in range(3):
        alert(session, store, settings, d1, at(1, hours=k))
    alert(session, store, settings, d2, at(2), label="confirmed")
    alert(session, store, settings, d2, at(3), label=None)  # awaiting review
    alert(session, store, settings, d2, at(4), label="unsure")
    alert(session, store, settings, d2, at(4, 1), cls="baby_cry", cause="speech", grade="resembles")

    js = summary(lead)
    assert js["week"]["label"] == WEEK
    f = figures(js)
    home_months = 2 * 7 * 86400 / HM
    assert f["home_months"] == pytest.approx(home_months)
    exact = rates.poisson_rate(3, home_months)
    assert f["rate"]["events"] == 3
    assert f["rate"]["estimate"] == pytest.approx(exact.estimate)
    assert (f["rate"]["low"], f["rate"]["high"]) == (pytest.approx(exact.low), pytest.approx(exact.high))
    assert f["alerts"] == {
        "false_alarm": 3,
        "confirmed": 1,
        "unsure": 1,
        "unusable": 0,
        "pending": 1,
        "staged_detections": 0,
        "outside_monitored_time": 0,
    }
    # Two homes: too few to judge how homes differ, so no home-level interval (never a zero width).
    assert f["home_rate"]["homes"] == 2 and f["home_rate"]["reason"] == "too_few_homes"
    assert f["home_rate"]["low"] is None and f["home_rate"]["high"] is None
    assert f["home_rate"]["estimate"] == pytest.approx(3 / home_months)
    table = homes_of(f)
    assert table[h1.code]["false_alarms"] == 3 and table[h2.code]["false_alarms"] == 0
    assert table[h1.code]["share"] == pytest.approx(1.0)
    assert f["concentration"]["top_home"] == h1.code
    # The rule judges over homes; two homes cannot show it either way (formerly "not_met" on the
    # exact Poisson interval alone, which treated the two homes as alike).
    assert f["readiness"]["state"] == "not_yet_shown" and f["readiness"]["reason"] == "too_few_homes"
    # Every alert was its own disturbance (hours apart); the awaiting and unsure ones are open.
    assert f["disturbances"]["false_alarm"] == 3 and f["readiness"]["open_count"] == 2
    assert f["readiness"]["unusable"] == 0
    # Other classes keep their own false alarms.
    baby = figures(js, "baby_cry")
    assert baby["rate"]["events"] == 1
    assert baby["grades"][0]["grade"] in ("forgivable", "unforgivable")
    assert {g["grade"]: g["false_alarms"] for g in baby["grades"]}["forgivable"] == 1
    # No personal data: homes appear by code only.
    households_service.set_contact(session, h1, names="Orla Quennell", phone="01632 960123")
    for text in (
        lead.get(f"/api/v1/trials/LARCH-1/summary?week={WEEK}").text,
        lead.get(f"/summary?trial=LARCH-1&week={WEEK}").text,
    ):
        assert h1.code in text and "Quennell" not in text and "960123" not in text


def test_device_moved_mid_week_splits_time_and_alerts_between_homes(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    device, first = installed(session, larch)
    second = factories.make_registered_home(session, larch, state="consented", at=at(-20))
    listen(session, device, W0, W1)
    alert(session, store, settings, device, at(1))
    households_service.move_device(session, device=device, to_home=second, room="hallway", at=at(2, 12))
    households_service.transition(session, second, "active", at=at(2, 12))
    alert(session, store, settings, device, at(3))
    alert(session, store, settings, device, at(5))

    f = figures(summary(lead))
    table = homes_of(f)
    assert table[first.code]["home_months"] == pytest.approx(2.5 * 86400 / HM)
    assert table[second.code]["home_months"] == pytest.approx(4.5 * 86400 / HM)
    assert (table[first.code]["false_alarms"], table[second.code]["false_alarms"]) == (1, 2)
    rooms = {r["room"]: r for r in next(b for b in f["breakdowns"] if b["dimension"] == "room")["table"]}
    assert rooms["kitchen"]["false_alarms"] == 1 and rooms["hallway"]["device_months"] == pytest.approx(
        4.5 * 86400 / HM
    )


def test_firmware_breakdown_follows_an_upgrade_mid_week(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    """Time and false alarms go to the firmware the device reported then, not to its current one."""
    steady, _ = installed(session, larch)
    upgraded, _ = installed(session, larch)
    for d in (steady, upgraded):
        listen(session, d, W0, W1)
    session.add_all(
        [
            FirmwareChange(device_id=steady.id, at=at(-14), firmware="4.1.0"),
            FirmwareChange(device_id=upgraded.id, at=at(-14), firmware="4.1.0"),
            FirmwareChange(device_id=upgraded.id, at=at(2, 12), firmware="4.2.0"),
        ]
    )
    session.flush()
    alert(session, store, settings, steady, at(4))
    alert(session, store, settings, upgraded, at(1))  # before the upgrade
    alert(session, store, settings, upgraded, at(3))
    alert(session, store, settings, upgraded, at(5))

    f = figures(summary(lead))
    table = next(b for b in f["breakdowns"] if b["dimension"] == "firmware")["table"]
    rows = {r["firmware"]: (r["false_alarms"], r["device_months"]) for r in table}
    assert rows.keys() == {"4.1.0", "4.2.0"}
    assert rows["4.1.0"][0] == 2 and rows["4.1.0"][1] == pytest.approx(9.5 * 86400 / HM)
    assert rows["4.2.0"][0] == 2 and rows["4.2.0"][1] == pytest.approx(4.5 * 86400 / HM)
    assert f["rate"]["events"] == 4 and f["home_months"] == pytest.approx(14 * 86400 / HM)
    comparison = f["firmware_comparison"]
    assert {comparison["version_a"], comparison["version_b"]} == {"4.1.0", "4.2.0"}


def test_corrected_installation_date_applies_to_time_and_alerts(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    first, home = installed(session, larch)
    listen(session, first, W0, W1)
    # A second device went up on Tuesday but was logged as installed on Thursday.
    second, _ = factories.make_device(session, larch)
    households_service.install_device(session, home=home, device=second, room="landing", installed_at=at(3))
    listen(session, second, at(1), W1)
    alert(session, store, settings, second, at(2))
    f = figures(summary(lead))
    # The home was monitored all week by its first device; the second adds device time, not home
    # time (this read 7 + 4 days of home time while home time summed device time).
    assert f["home_months"] == pytest.approx(7 * 86400 / HM)
    assert f["device_months"] == pytest.approx((7 + 4) * 86400 / HM)
    assert f["rate"]["events"] == 0 and f["alerts"]["outside_monitored_time"] == 1

    inst = next(
        i for i in installations_service.list_installations(session, home=home) if i.device_id == second.id
    )
    installations_service.correct_installation(
        session, inst, installed_at=at(1), removed_at=None, room="landing"
    )
    f = figures(summary(lead))
    assert f["home_months"] == pytest.approx(7 * 86400 / HM)
    assert f["device_months"] == pytest.approx((7 + 6) * 86400 / HM)
    assert f["rate"]["events"] == 1 and f["alerts"]["outside_monitored_time"] == 0
    rooms = {
        r["room"]: r["device_months"]
        for r in next(b for b in f["breakdowns"] if b["dimension"] == "room")["table"]
    }
    assert rooms["landing"] == pytest.approx(6 * 86400 / HM)


def test_home_withdrawn_mid_month_stops_counting(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    device, home = installed(session, larch)
    other, _ = installed(session, larch)
    for d in (device, other):
        listen(session, d, W0 - dt.timedelta(days=14), W1)
    alert(session, store, settings, device, at(-10))
    alert(session, store, settings, device, at(1))
    households_service.transition(session, home, "withdrawn", at=at(2))
    alert(session, store, settings, device, at(4))  # the device kept sending after the withdrawal

    js = summary(lead)
    week, to_date = figures(js), figures(js, scope="to_date")
    assert homes_of(week)[home.code]["home_months"] == pytest.approx(2 * 86400 / HM)
    assert homes_of(week)[home.code]["false_alarms"] == 1
    assert week["alerts"]["outside_monitored_time"] == 1
    assert homes_of(to_date)[home.code]["false_alarms"] == 2
    outside = {r["reason"]: r["alerts"] for r in js["operations"]["outside_monitored_time"]}
    assert outside == {"unassigned": 1}


def test_heartbeat_gaps_and_alerts_while_offline_are_not_monitored(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    device, _ = installed(session, larch)
    device.heartbeat_interval_s = 3600
    beat = {"listening": True, "firmware": "2.4.1"}

    def hb(when: dt.datetime, listening: bool = True) -> None:
        devices_service.record_heartbeat(
            session,
            device=device,
            beat=HeartbeatIn(sent_at=when, **{**beat, "listening": listening}),
            settings=settings,
            now=when,
        )

    for h in range(0, 25):  # Monday 00:00 to Tuesday 00:00, hourly
        hb(at(0, h))
    # Silence for 12 hours (more than 3 x the interval), then hourly until Tuesday 18:00.
    for h in range(12, 19):
        hb(at(1, h))
    hb(at(1, 19), listening=False)  # muted: closes the segment at its last listening beat
    heard = alert(session, store, settings, device, at(0, 10))
    gap = alert(session, store, settings, device, at(1, 6))  # in the heartbeat gap
    muted = alert(session, store, settings, device, at(1, 21))  # while muted
    # Only the alert inside a stored segment is marked at ingest; the others are left for analytics.
    assert [a.within_listening for a in (heard, gap, muted)] == [True, None, None]
    segments = session.scalars(select(ListeningSegment).where(ListeningSegment.device_id == device.id)).all()
    assert sorted((s.ended_at - s.started_at).total_seconds() / 3600 for s in segments) == [6.0, 24.0]

    js = summary(lead)
    f = figures(js)
    assert f["home_months"] == pytest.approx((24 + 6) * 3600 / HM)
    assert f["rate"]["events"] == 1
    assert f["alerts"]["outside_monitored_time"] == 2
    assert {r["reason"]: r["alerts"] for r in js["operations"]["outside_monitored_time"]} == {"offline": 2}
    assert js["operations"]["uptime_share"] == pytest.approx(30 / (7 * 24))
    # The mark only spares analytics a segment look-up: with it cleared the summary is the same.
    session.execute(update(Alert).values(within_listening=None))
    session.flush()
    assert summary(lead) == js


def test_zero_monitored_time_is_a_state_not_a_division(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    installed(session, larch)  # installed, but the device never listened
    js = summary(lead)
    f = figures(js)
    assert f["home_months"] == 0
    assert f["rate"]["estimate"] is None and f["rate"]["reason"] == "no_monitored_time"
    assert f["home_rate"]["reason"] == "no_monitored_time"
    assert f["readiness"]["state"] == "not_yet_shown" and f["readiness"]["reason"] == "no_monitored_time"
    page = lead.get(f"/summary?trial=LARCH-1&week={WEEK}")
    assert page.status_code == 200 and "no monitored time" in page.text


def test_staged_events_matched_at_the_window_edges(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    d1, home = installed(session, larch)
    d2, _ = factories.make_device(session, larch)
    households_service.install_device(session, home=home, device=d2, room="landing", installed_at=at(-20))
    d3, elsewhere = installed(session, larch)
    for d in (d1, d2, d3):
        listen(session, d, W0, W1)
    t0 = at(2, 10)
    t1 = t0 + dt.timedelta(seconds=60)
    staged_service.log_staged_event(
        session,
        home=home,
        sound_class="smoke_alarm",
        started_at=t0,
        ended_at=t1,
        source="test button on the hallway alarm, 3 m from the device",
    )
    later = t0 + dt.timedelta(hours=5)
    staged_service.log_staged_event(
        session,
        home=home,
        sound_class="smoke_alarm",
        started_at=later,
        ended_at=later + dt.timedelta(seconds=60),
        source="recorded alarm, kitchen",
    )
    staged_service.log_staged_event(
        session,
        home=home,
        sound_class="glass_break",
        started_at=at(3),
        ended_at=at(3, seconds=30),
        source="bottle in a bin, 2 m",
    )
    # First event: an alert 30 s before the start (edge, matched; a reviewer called it a false alarm),
    # the second device 20 s in, an alert 90 s after the end's edge (not matched), another class.
    alert(session, store, settings, d2, t0 + dt.timedelta(seconds=20), label="confirmed", score=0.7)
    alert(session, store, settings, d1, t0 - dt.timedelta(seconds=30), score=0.95)
    alert(session, store, settings, d1, t1 + dt.timedelta(seconds=31))
    alert(session, store, settings, d1, t0 + dt.timedelta(seconds=10), cls="baby_cry", cause="speech")
    alert(session, store, settings, d3, t0 + dt.timedelta(seconds=5))  # another home
    # Second event: exactly at the end + 30 s.
    alert(session, store, settings, d1, later + dt.timedelta(seconds=90), label="confirmed", score=0.8)

    js = summary(lead)
    f = figures(js)
    det = f["detection"]
    assert (det["events"], det["detected"]) == (2, 2)
    assert det["latency_median_s"] == pytest.approx((-30 + 90) / 2)
    assert f["alerts"]["staged_detections"] == 3
    # False alarms left: the one 31 s past the edge and the one from the other home.
    assert f["rate"]["events"] == 2
    assert homes_of(f)[home.code]["false_alarms"] == 1 and homes_of(f)[elsewhere.code]["false_alarms"] == 1
    assert figures(js, "baby_cry")["rate"]["events"] == 1  # a false alarm for its own class
    glass = figures(js, "glass_break")["detection"]
    assert (glass["events"], glass["detected"]) == (1, 0)
    assert glass["missed"][0]["home_code"] == home.code and "bottle" in glass["missed"][0]["source"]
    # What-if: the detection at 0.95 survives a threshold of 0.9, the one at 0.8 does not.
    rows = {round(r["threshold"], 3): r for r in f["whatif"]}
    assert rows[0.9]["detected"] == 1 and rows[0.9]["events"] == 2


def test_tables_download_as_csv(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    device, home = installed(session, larch)
    listen(session, device, W0, W1)
    alert(session, store, settings, device, at(1))
    names = lead.get(f"/api/v1/trials/LARCH-1/summary/tables?week={WEEK}").json()["tables"]
    assert "smoke_alarm-week-homes" in names and "overview" in names and "smoke_alarm-trend" in names
    r = lead.get(f"/api/v1/trials/LARCH-1/summary/tables/smoke_alarm-week-homes.csv?week={WEEK}")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(r.text)))
    assert rows[0]["home_code"] == home.code and rows[0]["false_alarms"] == "1"
    trend = list(
        csv.DictReader(
            io.StringIO(
                lead.get(f"/api/v1/trials/LARCH-1/summary/tables/smoke_alarm-trend.csv?week={WEEK}").text
            )
        )
    )
    assert [t["week"] for t in trend] == ["2026-W37", "2026-W38", "2026-W39", "2026-W40"]
    assert trend[-1]["false_alarms"] == "1"
    missing = lead.get(f"/api/v1/trials/LARCH-1/summary/tables/nothing-here.csv?week={WEEK}")
    assert missing.status_code == 404 and missing.json()["error"]["code"] == "unknown_table"
    assert lead.get("/api/v1/health").status_code == 200


def test_default_week_is_the_last_complete_one(session, larch, lead):  # type: ignore[no-untyped-def]
    js = lead.get("/api/v1/trials/LARCH-1/summary").json()
    assert js["week"]["label"] == "2026-W40"  # NOW is the Wednesday of W41


@pytest.mark.parametrize(
    ("week", "code", "status"),
    [
        ("2026-48", "invalid_request", 422),
        ("2026-W99", "validation_failed", 422),
        ("2026-W30", "validation_failed", 422),  # before the trial started
        ("2027-W10", "validation_failed", 422),  # not started yet
    ],
)
def test_bad_weeks_are_refused(larch, lead, week, code, status):  # type: ignore[no-untyped-def]
    r = lead.get(f"/api/v1/trials/LARCH-1/summary?week={week}")
    assert r.status_code == status and r.json()["error"]["code"] == code
    assert lead.get("/api/v1/health").status_code == 200


def test_unknown_trial_and_roles(larch, lead, staff_client):  # type: ignore[no-untyped-def]
    r = lead.get(f"/api/v1/trials/NOPE/summary?week={WEEK}")
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_trial"
    reviewer = staff_client("reviewer")
    r = reviewer.get(f"/api/v1/trials/LARCH-1/summary?week={WEEK}")
    assert r.status_code == 403 and r.json()["error"]["code"] == "forbidden"


def test_page_and_export_carry_the_caution_and_charts(session, store, settings, larch, lead):  # type: ignore[no-untyped-def]
    device, home = installed(session, larch)
    listen(session, device, W0 - dt.timedelta(days=14), W1)
    for k in range(4):
        alert(session, store, settings, device, at(k))
    page = lead.get(f"/summary?trial=LARCH-1&week={WEEK}")
    assert page.status_code == 200
    for text in (
        "not a certified life-safety device",
        "certified smoke and CO alarms",
        "household's consent",
        "Staged test events are planned tests, not real emergencies",
        "<svg",
        "home-month",
        home.code,
    ):
        assert text in page.text
    export = lead.get(f"/summary/export?trial=LARCH-1&week={WEEK}")
    assert export.status_code == 200 and "attachment" in export.headers["content-disposition"]
    body = export.text
    assert body.count("<svg") >= 3 and "not a certified life-safety device" in body
    # Self-contained: nothing to fetch when opened.
    assert re.findall(r'(?:src|href)="(?!#)', body) == [] and "<link" not in body


def test_weekly_summary_service_reads_the_review_overview(session, store, settings, larch):  # type: ignore[no-untyped-def]
    device, _ = installed(session, larch)
    listen(session, device, W0, W1)
    alert(session, store, settings, device, at(1), label=None)
    s = weekly.build_summary(session, trial_code="LARCH-1", week=WEEK, now=NOW)
    assert s.operations.review is not None and s.operations.review.backlog == 1
    assert s.operations.quota == ()
    assert s.operations.homes_monitored == 1 and s.operations.devices_monitored == 1
    assert session.scalar(select(func.count()).select_from(Alert)) == 1


def test_weeks_follow_the_trial_time_zone_across_the_clock_change(
    session, store, settings, staff_client, app
):  # type: ignore[no-untyped-def]
    # Clocks in London go back at 01:00 UTC on Sunday 25 October 2026: week 2026-W43 has 169 hours.
    factories.make_trial(
        session,
        code="LARCH-2",
        name="Larchmere, local weeks",
        starts_on=dt.date(2026, 10, 5),
        timezone="Europe/London",
    )
    trial = trials_service.get_trial(session, "LARCH-2")
    device, _ = installed(session, trial, since=dt.date(2026, 10, 5))
    listen(session, device, dt.datetime(2026, 10, 12, tzinfo=UTC), dt.datetime(2026, 11, 9, tzinfo=UTC))
    # Monday 00:30 local in summer time is Sunday 23:30 UTC: it belongs to the local week W43.
    alert(session, store, settings, device, dt.datetime(2026, 10, 18, 23, 30, tzinfo=UTC))
    alert(session, store, settings, device, dt.datetime(2026, 10, 18, 22, 30, tzinfo=UTC))  # Sunday, W42
    app.state.clock = lambda: dt.datetime(2026, 11, 10, tzinfo=UTC)
    lead = staff_client("lead")
    js = lead.get("/api/v1/trials/LARCH-2/summary?week=2026-W43").json()
    f = figures(js)
    assert js["week"]["start_at"] == "2026-10-18T23:00:00+00:00"
    assert f["home_months"] == pytest.approx(169 * 3600 / HM)
    assert f["rate"]["events"] == 1
    trend = {
        t["week"]: t for t in next(c for c in js["classes"] if c["sound_class"] == "smoke_alarm")["trend"]
    }
    assert trend["2026-W42"]["false_alarms"] == 1 and trend["2026-W43"]["false_alarms"] == 1
    assert trend["2026-W42"]["home_months"] == pytest.approx(
        (6 * 24 + 23) * 3600 / HM
    )  # from Monday 12 Oct 00:00 UTC
    assert trend["2026-W41"]["home_months"] == 0 and trend["2026-W41"]["reason"] == "no_monitored_time"
    assert list(trend) == ["2026-W41", "2026-W42", "2026-W43"]
