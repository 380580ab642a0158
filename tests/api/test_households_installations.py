"""Installations: one home per device at a time, moves, corrections that re-attribute alerts,
listening hours on the home page, and staged test events."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select

from server.auth.models import AuditEvent
from server.devices.models import Alert, ListeningSegment
from server.households import views
from server.installations import service as installations_service
from tests import factories
from tests.conftest import csrf_of


def json_client(staff_client, role="coordinator"):  # type: ignore[no-untyped-def]
    c = staff_client(role)
    c.headers["X-CSRF-Token"] = csrf_of(c)
    return c


def day(n: int, hour: int = 9) -> dt.datetime:
    """Day n of a scenario that started 60 days ago (at midnight UTC)."""
    start = (dt.datetime.now(dt.UTC) - dt.timedelta(days=60)).replace(
        hour=0, minute=0, second=0, microsecond=0
    )
    return start + dt.timedelta(days=n, hours=hour)


def test_overlapping_installations_are_refused(staff_client, session, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    h1 = factories.make_registered_home(session, trial, state="consented", at=day(0))
    h2 = factories.make_registered_home(session, trial, state="consented", at=day(0))
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": h1.code,
            "room": "kitchen",
            "installed_at": day(1).isoformat(),
        },
    )
    assert r.status_code == 201, r.text
    first = r.json()["installation"]["id"]
    assert (
        c.post(f"/api/v1/installations/{first}/removal", json={"removed_at": day(10).isoformat()}).status_code
        == 200
    )
    # Inside the closed period: refused.
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": h2.code,
            "room": "landing",
            "installed_at": day(5).isoformat(),
        },
    )
    assert r.status_code == 409 and r.json()["error"]["code"] == "installation_overlap"
    assert h1.code in r.json()["error"]["message"]
    # Right at the removal: touching is not overlapping.
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": h2.code,
            "room": "landing",
            "installed_at": day(10).isoformat(),
        },
    )
    assert r.status_code == 201, r.text
    # A correction that would stretch the first period over the second is refused as well.
    r = c.patch(f"/api/v1/installations/{first}", json={"removed_at": day(12).isoformat()})
    assert r.status_code == 409 and r.json()["error"]["code"] == "installation_overlap"
    assert c.get("/api/v1/health").status_code == 200


def test_device_in_a_home_must_be_moved_not_installed_twice(staff_client, session, settings, store, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    h1 = factories.make_installed_home(session, trial, device, installed_at=day(1))
    h2 = factories.make_registered_home(session, trial, state="consented", at=day(0))
    body = {"device": device.serial, "home": h2.code, "room": "nursery", "installed_at": day(20).isoformat()}
    r = c.post("/api/v1/installations", json=body)
    assert r.status_code == 409 and r.json()["error"]["code"] == "device_installed_elsewhere"
    a_before = factories.make_alert(session, store, settings, device, detected_at=day(15))
    a_after = factories.make_alert(session, store, settings, device, detected_at=day(25))
    assert a_after.home_id == h1.id  # still installed in h1 when it arrived
    r = c.post("/api/v1/installations", json={**body, "move": True})
    assert r.status_code == 201, r.text
    out = r.json()
    assert out["closed"]["home"] == h1.code and out["closed"]["removed_at"].startswith(
        day(20).date().isoformat()
    )
    assert out["installation"]["home"] == h2.code and out["installation"]["room"] == "nursery"
    assert out["alerts_reattributed"] == 1
    session.refresh(a_before)
    session.refresh(a_after)
    assert (a_before.home_id, a_after.home_id) == (h1.id, h2.id)
    assert c.get(f"/api/v1/homes/{h2.code}").json()["state"] == "installed"


def test_correcting_dates_reattributes_alerts_and_is_audited(staff_client, session, settings, store, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(10))
    early = factories.make_alert(session, store, settings, device, detected_at=day(8))
    late = factories.make_alert(session, store, settings, device, detected_at=day(12))
    assert (early.home_id, late.home_id) == (None, home.id)
    inst = installations_service.list_installations(session, home=home)[0]
    # The device really went in on day 7: the early alert belongs to the home too.
    r = c.patch(f"/api/v1/installations/{inst.id}", json={"installed_at": day(7).isoformat()})
    assert r.status_code == 200, r.text
    assert r.json()["alerts_reattributed"] == 1
    session.refresh(early)
    assert (early.home_id, early.installation_id) == (home.id, inst.id)
    ev = session.scalars(select(AuditEvent).where(AuditEvent.action == "installation.correct")).all()
    assert len(ev) == 1 and ev[0].detail["alerts_reattributed"] == 1
    assert ev[0].detail["before"]["installed_at"] == day(10).isoformat()
    # And it was removed on day 11: the late alert is no longer the home's.
    r = c.patch(f"/api/v1/installations/{inst.id}", json={"removed_at": day(11).isoformat()})
    assert r.status_code == 200 and r.json()["alerts_reattributed"] == 1
    session.refresh(late)
    assert (late.home_id, late.installation_id) == (None, None)
    homes = {a.id: a.home_id for a in session.scalars(select(Alert).where(Alert.device_id == device.id))}
    assert homes == {early.id: home.id, late.id: None}


def test_removal_moves_alerts_already_loaded_in_the_session(session, settings, store, trial):
    # Attribution writes alert rows by table; an Alert object the caller holds must not keep its
    # old home (no refresh here on purpose).
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(10))
    kept = factories.make_alert(session, store, settings, device, detected_at=day(10, 12))
    late = factories.make_alert(session, store, settings, device, detected_at=day(12))
    assert (kept.home_id, late.home_id) == (home.id, home.id)
    inst = installations_service.list_installations(session, home=home)[0]
    installations_service.remove_installation(session, inst, removed_at=day(11))
    assert (late.home_id, late.installation_id) == (None, None)
    assert (kept.home_id, kept.installation_id) == (home.id, inst.id)
    assert installations_service.reattribute_alerts(session, device.id) == 0  # already in place


def test_listening_hours_follow_the_installation(session, trial):
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(3, 12))
    # Segments: 10 h before installation, 6 h across it (only 3 h after 12:00 count), 20 h inside.
    for s, e in [(day(1, 0), day(1, 10)), (day(3, 9), day(3, 15)), (day(4, 0), day(4, 20))]:
        session.add(ListeningSegment(device_id=device.id, started_at=s, ended_at=e, is_open=False))
    session.flush()
    ov = views.home_overview(session, home, now=day(5))
    assert sum(w.hours for w in ov.weekly_hours) == 23.0
    assert ov.installations[0].serial == device.serial
    inst = installations_service.list_installations(session, home=home)[0]
    installations_service.correct_installation(
        session, inst, installed_at=day(1, 5), removed_at=None, room="kitchen"
    )
    ov = views.home_overview(session, home, now=day(5))
    assert sum(w.hours for w in ov.weekly_hours) == 5.0 + 6.0 + 20.0


def test_device_of_another_trial_and_bad_room(staff_client, session, trial):
    c = json_client(staff_client)
    other = factories.make_trial(session)
    foreign, _ = factories.make_device(session, other)
    device, _ = factories.make_device(session, trial)
    home = factories.make_registered_home(session, trial, state="consented", at=day(0))
    r = c.post(
        "/api/v1/installations",
        json={
            "device": foreign.serial,
            "home": home.code,
            "room": "kitchen",
            "installed_at": day(1).isoformat(),
        },
    )
    assert r.status_code == 409 and r.json()["error"]["code"] == "device_other_trial"
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": home.code,
            "room": "attic",
            "installed_at": day(1).isoformat(),
        },
    )
    assert r.status_code == 422 and "room" in r.json()["error"]["fields"]
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": home.code,
            "room": "living room",
            "installed_at": day(1).isoformat(),
        },
    )
    assert r.status_code == 201 and r.json()["installation"]["room"] == "living_room"


def test_removal_before_installation_is_refused(staff_client, session, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(5))
    inst = installations_service.list_installations(session, home=home)[0]
    r = c.post(f"/api/v1/installations/{inst.id}/removal", json={"removed_at": day(4).isoformat()})
    assert r.status_code == 422 and "removed_at" in r.json()["error"]["fields"]
    assert (
        c.post(
            f"/api/v1/installations/{inst.id}/removal", json={"removed_at": day(6).isoformat()}
        ).status_code
        == 200
    )
    r = c.post(f"/api/v1/installations/{inst.id}/removal", json={"removed_at": day(7).isoformat()})
    assert r.status_code == 409 and r.json()["error"]["code"] == "installation_closed"


def test_staged_events_api(staff_client, session, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(2), room="hallway")
    body = {
        "home": home.code,
        "sound_class": "smoke_alarm",
        "started_at": day(4, 10).isoformat(),
        "ended_at": day(4, 10).replace(minute=2).isoformat(),
        "source": "test alarm in the hallway, 3 m from the device",
        "level_db": 85,
    }
    r = c.post("/api/v1/staged-events", json=body)
    assert r.status_code == 201, r.text
    ev = r.json()
    assert (ev["home"], ev["sound_class"], ev["level_db"]) == (home.code, "smoke_alarm", 85.0)
    listed = c.get(f"/api/v1/staged-events?home={home.code}").json()
    assert [e["id"] for e in listed] == [ev["id"]]
    # Before any device was in the home, nothing could hear a test.
    r = c.post(
        "/api/v1/staged-events",
        json={
            **body,
            "started_at": day(1).isoformat(),
            "ended_at": (day(1) + dt.timedelta(minutes=1)).isoformat(),
        },
    )
    assert r.status_code == 422 and "started_at" in r.json()["error"]["fields"]
    r = c.post(
        "/api/v1/staged-events", json={**body, "sound_class": "doorbell", "ended_at": body["started_at"]}
    )
    assert r.status_code == 422 and set(r.json()["error"]["fields"]) == {"sound_class", "ended_at"}
    assert c.delete(f"/api/v1/staged-events/{ev['id']}").status_code == 204
    assert c.get(f"/api/v1/staged-events?home={home.code}").json() == []
    lead = json_client(staff_client, "lead")
    assert lead.post("/api/v1/staged-events", json=body).status_code == 403
