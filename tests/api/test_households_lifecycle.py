"""Homes through the JSON API: codes, attributes, lifecycle rules and the consent gate."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select

from server.auth.models import AuditEvent
from server.households import service
from server.households.models import HomeStateChange
from server.installations.models import Installation
from tests import factories
from tests.conftest import csrf_of


def json_client(staff_client, role="coordinator"):  # type: ignore[no-untyped-def]
    c = staff_client(role)
    c.headers["X-CSRF-Token"] = csrf_of(c)
    return c


def base_time() -> dt.datetime:
    return (dt.datetime.now(dt.UTC) - dt.timedelta(days=60)).replace(
        hour=9, minute=0, second=0, microsecond=0
    )


def assert_healthy(client) -> None:  # type: ignore[no-untyped-def]
    assert client.get("/api/v1/health").status_code == 200


def test_new_homes_get_sequential_codes(staff_client, trial):
    c = json_client(staff_client)
    a = c.post("/api/v1/homes", json={"trial": trial.code, "attributes": {"dog": "yes", "occupants": 3}})
    b = c.post("/api/v1/homes", json={"trial": trial.code})
    assert a.status_code == 201 and b.status_code == 201, a.text
    ca, cb = a.json()["code"], b.json()["code"]
    assert ca.startswith("H-") and len(ca) == 6
    assert int(cb[2:]) == int(ca[2:]) + 1
    assert a.json()["state"] == "candidate"
    assert a.json()["attributes"] == {"dog": True, "occupants": 3}


def test_explicit_code_must_be_free_and_well_formed(staff_client, trial):
    c = json_client(staff_client)
    assert c.post("/api/v1/homes", json={"trial": trial.code, "code": "H-9001"}).status_code == 201
    r = c.post("/api/v1/homes", json={"trial": trial.code, "code": "H-9001"})
    assert r.status_code == 409 and r.json()["error"]["code"] == "home_exists"
    r = c.post("/api/v1/homes", json={"trial": trial.code, "code": "Smith"})
    assert r.status_code == 422 and r.json()["error"]["fields"]["code"]
    assert_healthy(c)


def test_attribute_values_are_checked_against_the_catalogue(staff_client, trial):
    c = json_client(staff_client)
    r = c.post(
        "/api/v1/homes",
        json={"trial": trial.code, "attributes": {"occupants": 0, "dwelling_type": "castle", "pool": True}},
    )
    assert r.status_code == 422
    err = r.json()["error"]
    assert err["code"] == "validation_failed"
    assert set(err["fields"]) == {"occupants", "dwelling_type", "pool"}
    assert "below the smallest allowed value, 1" in err["fields"]["occupants"]
    assert_healthy(c)


def test_patch_changes_only_given_answers(staff_client, trial):
    c = json_client(staff_client)
    code = c.post(
        "/api/v1/homes", json={"trial": trial.code, "attributes": {"dog": True, "cat": True}}
    ).json()["code"]
    r = c.patch(f"/api/v1/homes/{code}", json={"attributes": {"cat": None, "dwelling_type": "Flat"}})
    assert r.status_code == 200
    assert r.json()["attributes"] == {"dog": True, "dwelling_type": "flat"}


def test_full_walk_records_every_step(staff_client, session, trial):
    c = json_client(staff_client)
    t0 = base_time()
    device, _ = factories.make_device(session, trial)
    code = c.post(
        "/api/v1/homes", json={"trial": trial.code, "at": (t0 - dt.timedelta(days=1)).isoformat()}
    ).json()["code"]

    def step(to, at, **kw):  # type: ignore[no-untyped-def]
        r = c.post(f"/api/v1/homes/{code}/transitions", json={"to_state": to, "at": at.isoformat(), **kw})
        assert r.status_code == 200, r.text
        return r.json()

    step("screened", t0, note="phone screening done")
    r = c.post(
        f"/api/v1/homes/{code}/consents",
        json={
            "form_version": "2.1",
            "consented_on": t0.date().isoformat(),
            "retention_days": 60,
            "mark_consented": True,
            "at": t0.isoformat(),
        },
    )
    assert r.status_code == 201, r.text
    assert c.get(f"/api/v1/homes/{code}").json()["state"] == "consented"
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": code,
            "room": "hallway",
            "installed_at": (t0 + dt.timedelta(days=1)).isoformat(),
        },
    )
    assert r.status_code == 201, r.text
    assert c.get(f"/api/v1/homes/{code}").json()["state"] == "installed"
    step("active", t0 + dt.timedelta(days=2))
    step("paused", t0 + dt.timedelta(days=5), listening=False, note="family away")
    step("active", t0 + dt.timedelta(days=9))
    out = step("withdrawn", t0 + dt.timedelta(days=20))
    assert out["closed_installations"] == [r.json()["installation"]["id"]]
    tl = c.get(f"/api/v1/homes/{code}/timeline").json()
    steps = [(e["from_state"], e["to_state"]) for e in tl]
    assert steps[0][1] == "candidate" and steps[0][0] is None
    assert steps[1:] == [
        ("candidate", "screened"),
        ("screened", "consented"),
        ("consented", "installed"),
        ("installed", "active"),
        ("active", "paused"),
        ("paused", "active"),
        ("active", "withdrawn"),
    ]
    pause = tl[5]
    assert pause["listening"] is False and pause["note"] == "family away"
    assert pause["author"] == c.user.name  # type: ignore[attr-defined]
    assert dt.datetime.fromisoformat(pause["at"]) == t0 + dt.timedelta(days=5)
    inst = session.scalar(select(Installation).where(Installation.device_id == device.id))
    assert inst is not None and inst.removed_at == t0 + dt.timedelta(days=20)


def test_illegal_transition_is_refused_with_a_clear_message(staff_client, trial):
    c = json_client(staff_client)
    code = c.post("/api/v1/homes", json={"trial": trial.code}).json()["code"]
    r = c.post(f"/api/v1/homes/{code}/transitions", json={"to_state": "active"})
    assert r.status_code == 409
    assert r.json()["error"] == {
        "code": "illegal_transition",
        "message": f"{code} cannot go from candidate to active; from candidate it can go to: "
        "screened, declined.",
    }
    assert c.get(f"/api/v1/homes/{code}").json()["state"] == "candidate"
    assert_healthy(c)


def test_consent_gate_blocks_consented_and_installed(staff_client, session, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    home = factories.make_registered_home(session, trial, state="screened")
    r = c.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "consented"})
    assert r.status_code == 409 and r.json()["error"]["code"] == "consent_missing"
    r = c.post(
        "/api/v1/installations",
        json={
            "device": device.serial,
            "home": home.code,
            "room": "kitchen",
            "installed_at": base_time().isoformat(),
        },
    )
    assert r.status_code == 409 and r.json()["error"]["code"] == "consent_missing"
    assert session.scalar(select(Installation.id).where(Installation.home_id == home.id)) is None
    assert_healthy(c)


def test_installed_needs_a_device_in_place(session, trial):
    home = factories.make_registered_home(session, trial, state="consented")
    try:
        service.transition(session, home, "installed")
    except Exception as exc:  # noqa: BLE001 - the type and code are asserted below
        assert getattr(exc, "code", None) == "no_device_installed"
    else:
        raise AssertionError("installed without a device was accepted")
    assert home.state == "consented"


def test_withdrawn_is_final_and_dates_only_move_forward(staff_client, session, trial):
    c = json_client(staff_client)
    home = factories.make_registered_home(session, trial, state="consented")
    r = c.post(
        f"/api/v1/homes/{home.code}/transitions",
        json={"to_state": "withdrawn", "at": (home.state_changed_at - dt.timedelta(hours=1)).isoformat()},
    )
    assert r.status_code == 422 and "at" in r.json()["error"]["fields"]
    assert c.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "withdrawn"}).status_code == 200
    r = c.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "active"})
    assert r.status_code == 409 and "withdrawal is final" in r.json()["error"]["message"]
    n = session.scalar(
        select(HomeStateChange.id).where(
            HomeStateChange.home_id == home.id, HomeStateChange.to_state == "active"
        )
    )
    assert n is None


def test_lead_reads_but_cannot_change(staff_client, session, trial):
    lead = json_client(staff_client, "lead")
    home = factories.make_registered_home(session, trial, state="screened")
    assert lead.get(f"/api/v1/homes/{home.code}").status_code == 200
    r = lead.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "declined"})
    assert r.status_code == 403 and r.json()["error"]["code"] == "forbidden"
    # Timeline notes are for coordinators: the lead sees the steps without them.
    notes = [e["note"] for e in lead.get(f"/api/v1/homes/{home.code}/timeline").json()]
    assert notes == [None, None]


def test_consent_is_recorded_and_audited(staff_client, session, trial):
    c = json_client(staff_client)
    home = factories.make_registered_home(session, trial, state="screened")
    r = c.post(
        f"/api/v1/homes/{home.code}/consents",
        json={"form_version": "", "consented_on": "2999-01-01", "retention_days": 30},
    )
    assert r.status_code == 422
    assert set(r.json()["error"]["fields"]) == {"form_version", "consented_on"}
    r = c.post(
        f"/api/v1/homes/{home.code}/consents",
        json={
            "form_version": "3",
            "consented_on": base_time().date().isoformat(),
            "retention_days": 30,
            "staff_may_listen": False,
        },
    )
    assert r.status_code == 201
    consents = c.get(f"/api/v1/homes/{home.code}/consents").json()
    assert [(x["form_version"], x["retention_days"], x["staff_may_listen"]) for x in consents] == [
        ("3", 30, False)
    ]
    ev = session.scalar(select(AuditEvent).where(AuditEvent.action == "consent.record"))
    assert ev is not None and ev.detail["code"] == home.code
    # Without mark_consented the state is unchanged.
    assert c.get(f"/api/v1/homes/{home.code}").json()["state"] == "screened"


def test_register_list_filters_and_sorts(staff_client, session, trial):
    c = json_client(staff_client, "lead")
    a = factories.make_registered_home(session, trial, attributes={"dog": True, "dwelling_type": "flat"})
    b = factories.make_registered_home(session, trial, state="screened", attributes={"dog": False})
    d = factories.make_registered_home(session, trial, state="declined", attributes={"dog": True})
    codes = lambda r: [h["code"] for h in r.json()]  # noqa: E731
    base = f"/api/v1/homes?trial={trial.code}"
    assert codes(c.get(base)) == sorted([a.code, b.code, d.code])
    assert codes(c.get(base + "&descending=true")) == sorted([a.code, b.code, d.code], reverse=True)
    assert codes(c.get(base + "&state=screened")) == [b.code]
    assert codes(c.get(base + "&attribute=dog&value=yes")) == sorted([a.code, d.code])
    assert codes(c.get(base + "&attribute=dwelling_type")) == [a.code]
    r = c.get(base + "&attribute=dog&value=perhaps")
    assert r.status_code == 422 and r.json()["error"]["field"] == "value"
