"""The role matrix for personal data: who may see contact details, the audit of every view and
export, and that reviewers and leads meet no personal data on any page or API they can open."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from sqlalchemy import select

from server.auth.models import AuditEvent
from server.households import service
from server.quota import service as quota_service
from server.staged import service as staged_service
from tests import factories
from tests.conftest import csrf_of

SECRET_NAME = "Quentin Placeholder"
SECRET_STREET = "77 Nowhere Crescent"
SECRET_PHONE = "0113 496 0777"
SECRET_EMAIL = "quentin@example.test"
SECRET_NOTE = "ring twice, dog in garden"
SECRETS = (SECRET_NAME, SECRET_STREET, SECRET_PHONE, SECRET_EMAIL, SECRET_NOTE, "Quentin")


@pytest.fixture
def scenario(session, settings, store, trial):  # type: ignore[no-untyped-def]
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(
        session, trial, device, installed_at=now - dt.timedelta(days=20), attributes={"dog": True}
    )
    service.set_contact(
        session,
        home,
        names=SECRET_NAME,
        address=SECRET_STREET,
        phone=SECRET_PHONE,
        email=SECRET_EMAIL,
        access_notes=SECRET_NOTE,
    )
    service.transition(session, home, "paused", at=now - dt.timedelta(days=5), note="Quentin is in hospital")
    service.transition(session, home, "active", at=now - dt.timedelta(days=4))
    alert = factories.make_alert(session, store, settings, device, detected_at=now - dt.timedelta(days=3))
    staged_service.log_staged_event(
        session,
        home=home,
        sound_class="smoke_alarm",
        started_at=now - dt.timedelta(days=2),
        ended_at=now - dt.timedelta(days=2) + dt.timedelta(minutes=1),
        source="test alarm on the landing",
    )
    quota_service.add_target(session, trial, attribute_key="dog", value="yes", min_count=1)
    session.flush()
    return {"home": home, "device": device, "alert": alert, "trial": trial}


def personal_routes(code: str) -> list[tuple[str, str]]:
    return [
        ("GET", f"/homes/{code}/contact"),
        ("POST", f"/homes/{code}/contact"),
        ("GET", "/homes/export-personal.csv"),
        ("GET", f"/api/v1/homes/{code}/contact"),
        ("PUT", f"/api/v1/homes/{code}/contact"),
        ("GET", "/api/v1/homes/export-personal.csv"),
    ]


@pytest.mark.parametrize("role", ["reviewer", "lead"])
def test_reviewers_and_leads_get_403_on_every_personal_data_route(staff_client, scenario, role):
    c = staff_client(role)
    token = csrf_of(c)
    code = scenario["home"].code
    for method, path in personal_routes(code):
        kw: dict = {"headers": {"X-CSRF-Token": token}}
        if method == "PUT":
            kw["json"] = {"names": "x"}
        if method == "POST":
            kw = {"data": {"csrf_token": token, "names": "x"}}
        r = c.request(method, path, **kw)
        assert r.status_code == 403, (method, path, r.status_code)
        assert not any(s in r.text for s in SECRETS), (method, path)
    assert c.get("/api/v1/health").status_code == 200


def test_coordinator_views_and_exports_are_audited(staff_client, session, scenario):
    c = staff_client("coordinator")
    code = scenario["home"].code
    page = c.get(f"/homes/{code}/contact")
    assert (
        page.status_code == 200 and SECRET_NAME in page.text and page.headers["cache-control"] == "no-store"
    )
    api = c.get(f"/api/v1/homes/{code}/contact")
    assert api.status_code == 200 and api.json()["email"] == SECRET_EMAIL
    assert SECRET_PHONE in c.get(f"/homes/export-personal.csv?trial={scenario['trial'].code}").text
    events = session.scalars(
        select(AuditEvent)
        .where(AuditEvent.action.in_(["personal.view", "personal.export"]))
        .order_by(AuditEvent.id)
    ).all()
    assert [(e.action, e.detail.get("via")) for e in events] == [
        ("personal.view", "page"),
        ("personal.view", "api"),
        ("personal.export", None),
    ]
    assert {e.actor_id for e in events} == {c.user.id}  # type: ignore[attr-defined]
    # The home page itself shows no contact details (opening them is the audited step).
    home_page = c.get(f"/homes/{code}").text
    assert SECRET_NAME not in home_page and 'id="contact-link"' in home_page


def test_contact_form_validates_beside_the_fields(staff_client, scenario):
    c = staff_client("coordinator")
    code = scenario["home"].code
    token = csrf_of(c, f"/homes/{code}/contact")
    r = c.post(
        f"/homes/{code}/contact",
        data={"csrf_token": token, "names": "New Name", "email": "not-an-address", "phone": "call me maybe"},
    )
    assert r.status_code == 422
    assert re.search(r'id="err-email">This does not look like an e-mail address\.<', r.text)
    assert 'id="err-phone"' in r.text and 'value="New Name"' in r.text
    r = c.post(
        f"/homes/{code}/contact", data={"csrf_token": token, "names": "New Name"}, follow_redirects=False
    )
    assert r.status_code == 303


OURS = (
    "/homes",
    "/quota",
    "/api/v1/homes",
    "/api/v1/quota",
    "/api/v1/installations",
    "/api/v1/staged-events",
    "/api/v1/attributes",
)


def _routes():  # type: ignore[no-untyped-def]
    from server.analytics import api as a1
    from server.analytics import pages as a2
    from server.auth import pages as a3
    from server.devices import api as a4
    from server.devices import pages as a5
    from server.households import api as a6
    from server.households import home_pages as a11
    from server.households import installation_api as a16
    from server.households import installation_pages as a12
    from server.households import pages as a7
    from server.quota import api as a13
    from server.quota import pages as a14
    from server.review import api as a8
    from server.review import pages as a9
    from server.staged import api as a15
    from server.web import pages as a10

    for module in (a1, a2, a3, a4, a5, a6, a7, a8, a9, a10, a11, a12, a13, a14, a15, a16):
        for route in module.router.routes:
            methods = getattr(route, "methods", set()) or set()
            if "GET" in methods:
                yield route.path


@pytest.mark.parametrize("role", ["reviewer", "lead"])
def test_no_personal_data_on_any_page_or_api_they_can_open(staff_client, scenario, role):
    c = staff_client(role)
    s = scenario
    values = {
        "code": s["home"].code,
        "serial": s["device"].serial,
        "alert_id": str(s["alert"].id),
        "trial": s["trial"].code,
        "installation_id": "1",
        "event_id": "1",
    }
    opened = 0
    for path in sorted(set(_routes())):
        if path in ("/logout",):
            continue
        url = re.sub(r"\{(\w+)(:[^}]*)?\}", lambda m: values.get(m.group(1), "1"), path)
        r = c.get(url, params={"trial": s["trial"].code})
        if r.status_code == 200:
            opened += 1
        if path.startswith(OURS):
            assert r.status_code < 500, (url, r.text)
        body = r.text if "audio" not in r.headers.get("content-type", "") else ""
        for secret in SECRETS:
            assert secret not in body, (role, url)
    # They could open the register's read pages that their role allows.
    if role == "lead":
        for url in (
            f"/homes/{s['home'].code}",
            "/homes",
            "/quota",
            f"/api/v1/homes/{s['home'].code}/timeline",
        ):
            assert c.get(url, params={"trial": s["trial"].code}).status_code == 200, url
    else:
        assert c.get(f"/homes/{s['home'].code}").status_code == 403
        assert c.get(f"/api/v1/homes?trial={s['trial'].code}").status_code == 403
    assert opened > 0
