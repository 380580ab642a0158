"""Trial membership: a staff member limited to some trials sees nothing of the others.

Every staff route of the app is walked (enumerated as in test_staff_access.py) by each non-admin role
limited to trial A, with the path parameters and ``?trial=`` naming trial B's objects: nothing of B
may come back (404 with the route's own not-found code, or a page without B in it), and no write
may change B. An admin and a user with no membership rows still see both trials. Both backends.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.app import create_app
from server.auth.models import AuditEvent
from server.deps import get_session
from server.devices.models import Alert, Device
from server.errors import NotFound
from server.households.models import Home
from server.installations.models import Installation
from server.roles import CAPABILITIES
from server.staged.models import StagedEvent
from server.trials import service as trials_service
from server.trials.models import TrialMembership
from tests import factories
from tests.api.test_staff_access import PUBLIC, all_routes
from tests.conftest import csrf_of

ADMIN_ONLY = {"users.manage", "audit.view", "staff.self"}


@pytest.fixture
def app(settings, session: Session):  # type: ignore[no-untyped-def]
    """Like the shared fixture, but a fresh Session per request (as in production), on the test's
    connection: the trial scope lives on the request's session and must not outlive it."""
    application = create_app(settings)
    conn = session.connection()

    def _session() -> Iterator[Session]:
        s = Session(bind=conn, join_transaction_mode="create_savepoint", expire_on_commit=False)
        try:
            yield s
        finally:
            s.close()

    application.dependency_overrides[get_session] = _session
    return application


def _pilot(session: Session, store: Any, settings: Any, tag: str) -> dict[str, Any]:
    trial = factories.make_trial(session, code=f"{tag}-PILOT", name=f"{tag.title()} pilot")
    dev, _ = factories.make_device(session, trial, serial=f"SN-{tag}-77")
    home = factories.make_home(session, trial, code="H-74411" if tag == "ALDER" else "H-85522")
    now = dt.datetime.now(dt.UTC)
    inst = factories.make_installation(session, dev, home, installed_at=now - dt.timedelta(days=5))
    alert = factories.make_alert(session, store, settings, dev, detected_at=now - dt.timedelta(hours=1))
    staged = StagedEvent(
        trial_id=trial.id,
        home_id=home.id,
        sound_class="smoke_alarm",
        started_at=now - dt.timedelta(hours=3),
        ended_at=now - dt.timedelta(hours=2),
    )
    session.add(staged)
    session.flush()
    return {
        "trial": trial,
        "device": dev,
        "home": home,
        "inst": inst,
        "alert": alert,
        "staged": staged,
        "markers": (trial.code, dev.serial, home.code),
    }


@pytest.fixture
def pilots(session: Session, store, settings) -> dict[str, dict[str, Any]]:  # type: ignore[no-untyped-def]
    return {"A": _pilot(session, store, settings, "ALDER"), "B": _pilot(session, store, settings, "ROWAN")}


def _limit(session: Session, client: TestClient, *trials: Any) -> TestClient:
    trials_service.set_memberships(session, client.user, [t.code for t in trials], actor="test")  # type: ignore[attr-defined]
    session.flush()
    return client


def _values(p: dict[str, Any]) -> dict[str, str]:
    return {
        "serial": p["device"].serial,
        "alert_id": str(p["alert"].id),
        "code": p["home"].code,
        "installation_id": str(p["inst"].id),
        "event_id": str(p["staged"].id),
        "target_id": "1",
        "kind": "spectrogram",
        "name": "homes",
        "trial": p["trial"].code,
    }


def _url(path: str, route: Any, p: dict[str, Any]) -> str:
    values = _values(p)
    if path.startswith("/api/v1/trials/{code}"):
        values = {**values, "code": p["trial"].code}
    url = re.sub(r"\{(\w+)(:\w+)?\}", lambda m: values.get(m.group(1), "1"), path)
    if any(q.name == "trial" for q in route.dependant.query_params):
        url += "?trial=" + p["trial"].code
    return url


def _staff_routes(app: Any, methods: set[str]) -> list[tuple[str, str, Any, str]]:
    return [
        (m, path, route, caps[0])
        for m, path, route, caps in all_routes(app)
        if m in methods and len(caps) == 1 and (m, path) not in PUBLIC and caps[0] not in ADMIN_ONLY
    ]


def _leaks(text: str, markers: tuple[str, ...]) -> list[str]:
    return [m for m in markers if m in text]


# --- the rule -------------------------------------------------------------------------------------


def test_visible_trials_admin_all_unlimited_all_members_exactly(session: Session, pilots) -> None:  # type: ignore[no-untyped-def]
    a, b = pilots["A"]["trial"], pilots["B"]["trial"]
    admin, _ = factories.make_user(session, role="admin")
    coord, _ = factories.make_user(session, role="coordinator")
    lead, _ = factories.make_user(session, role="lead")
    assert trials_service.visible_trial_ids(session, coord) is None  # no rows: every trial
    assert trials_service.set_memberships(session, coord, ["alder-pilot"], actor=admin) == ["ALDER-PILOT"]
    assert trials_service.visible_trial_ids(session, coord) == {a.id}
    trials_service.set_memberships(session, admin, [b.code], actor=admin)
    assert trials_service.visible_trial_ids(session, admin) is None  # admins see all, rows or not
    assert trials_service.visible_trial_ids(session, lead) is None
    assert [t.code for t in trials_service.list_trials(session, user=coord)] == [a.code]
    assert trials_service.trial_in_view(session, None, user=coord).id == a.id
    with pytest.raises(NotFound) as exc:
        trials_service.get_trial(session, b.code, user=coord)
    assert exc.value.code == "unknown_trial"
    with pytest.raises(NotFound):
        trials_service.check_trial_access(session, coord, b.id)
    trials_service.check_trial_access(session, coord, a.id)
    trials_service.check_trial_access(session, lead, b.id)


def test_membership_changes_are_audited_and_unknown_codes_change_nothing(session: Session, pilots) -> None:  # type: ignore[no-untyped-def]
    a, b = pilots["A"]["trial"], pilots["B"]["trial"]
    admin, _ = factories.make_user(session, role="admin")
    coord, _ = factories.make_user(session, role="coordinator")
    trials_service.set_memberships(session, coord, [a.code, b.code], actor=admin)
    trials_service.set_memberships(session, coord, [b.code, a.code], actor=admin)  # same set: no event
    with pytest.raises(NotFound):
        trials_service.set_memberships(session, coord, [a.code, "NO-SUCH"], actor=admin)
    trials_service.set_memberships(session, coord, [], actor=admin)
    events = list(
        session.scalars(select(AuditEvent).where(AuditEvent.action == "user.trials").order_by(AuditEvent.id))
    )
    assert [(e.detail["before"], e.detail["after"]) for e in events] == [
        ([], sorted([a.code, b.code])),
        (sorted([a.code, b.code]), []),
    ]
    assert all(e.actor_id == admin.id and e.object_id == str(coord.id) for e in events)
    assert (
        session.scalar(select(func.count(TrialMembership.id)).where(TrialMembership.user_id == coord.id)) == 0
    )


# --- every route, read side -----------------------------------------------------------------------


def test_every_get_route_hides_the_other_trial(app, staff_client, session: Session, pilots) -> None:  # type: ignore[no-untyped-def]
    a, b = pilots["A"], pilots["B"]
    clients = {
        role: _limit(session, staff_client(role, is_adjudicator=True), a["trial"])
        for role in ("coordinator", "reviewer", "lead")
    }
    problems, checked, not_found = [], 0, 0
    for _, path, route, cap in _staff_routes(app, {"GET"}):
        url = _url(path, route, b)
        for role, c in clients.items():
            if role not in CAPABILITIES[cap]:
                continue
            r = c.get(url, follow_redirects=False)
            checked += 1
            if r.status_code >= 500 or r.status_code == 403:
                problems.append(f"{role} GET {url}: {r.status_code}")
            elif r.status_code == 404:
                not_found += 1
            elif r.status_code < 400 and _leaks(r.text, b["markers"]):
                problems.append(f"{role} GET {url}: {r.status_code} shows {_leaks(r.text, b['markers'])}")
    assert not problems, "\n".join(problems)
    assert checked >= 60 and not_found >= 25, (checked, not_found)


KEY_PAGES = [
    "/api/v1/devices",
    "/devices",
    "/api/v1/alerts",
    "/alerts",
    "/homes",
    "/api/v1/homes",
    "/homes/export.csv",
    "/api/v1/installations",
]


def test_key_pages_show_own_trial_to_limited_and_both_to_admin_and_unlimited(  # type: ignore[no-untyped-def]
    staff_client, session: Session, pilots
) -> None:
    a, b = pilots["A"], pilots["B"]
    limited = _limit(session, staff_client("coordinator"), a["trial"])
    admin = _limit(session, staff_client("admin"), a["trial"])  # rows are ignored for admins
    unlimited = staff_client("coordinator")

    def get(c: TestClient, url: str) -> str:
        r = c.get(url)
        assert r.status_code == 200, (url, r.status_code, r.text[:300])
        return r.text

    for url in KEY_PAGES:
        sep = "&" if "?" in url else "?"
        for trial_side in ("A", "B"):
            p = pilots[trial_side]
            u = url + (
                f"{sep}trial={p['trial'].code}"
                if url in ("/homes", "/api/v1/homes", "/homes/export.csv", "/api/v1/installations")
                else ""
            )
            for c in (admin, unlimited):
                assert _leaks(get(c, u), p["markers"][1:]), (u, "admin/unlimited sees it")
        assert _leaks(get(limited, url), a["markers"][1:]), url
        assert not _leaks(get(limited, url), b["markers"]), url
    for c in (admin, unlimited):
        assert c.get(f"/api/v1/homes/{b['home'].code}").status_code == 200
        assert c.get(f"/api/v1/alerts/{b['alert'].id}").status_code == 200
        assert c.get(f"/devices/{b['device'].serial}").status_code == 200
        assert c.get(f"/clips/{b['alert'].id}/audio").status_code == 200
    r = limited.get(f"/api/v1/homes/{b['home'].code}")
    assert r.status_code == 404 and r.json()["error"]["code"] != "forbidden"
    assert limited.get(f"/api/v1/homes/{a['home'].code}").status_code == 200
    r = limited.get(f"/api/v1/trials/{b['trial'].code}/summary")
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_trial"
    assert limited.get(f"/api/v1/trials/{a['trial'].code}/summary").status_code == 200
    assert limited.get(f"/clips/{b['alert'].id}/audio").status_code == 404
    assert limited.get(f"/clips/{a['alert'].id}/audio").status_code == 200


# --- every route, write side ----------------------------------------------------------------------


def _snapshot(session: Session, p: dict[str, Any]) -> tuple[Any, ...]:
    session.expire_all()
    home = session.get(Home, p["home"].id)
    dev = session.get(Device, p["device"].id)
    alert = session.get(Alert, p["alert"].id)
    assert home is not None and dev is not None and alert is not None
    insts = session.scalars(select(Installation).where(Installation.home_id == home.id)).all()
    return (
        home.state,
        dict(home.attributes),
        dev.revoked_at,
        alert.state,
        alert.private_flag,
        [(i.id, i.room, i.installed_at, i.removed_at) for i in insts],
        session.scalar(select(func.count(StagedEvent.id)).where(StagedEvent.trial_id == p["trial"].id)),
        session.scalar(select(func.count(Home.id)).where(Home.trial_id == p["trial"].id)),
        session.scalar(select(func.count(Device.id)).where(Device.trial_id == p["trial"].id)),
    )


def test_every_write_route_leaves_the_other_trial_alone(app, staff_client, session: Session, pilots) -> None:  # type: ignore[no-untyped-def]
    a, b = pilots["A"], pilots["B"]
    clients = {
        role: _limit(session, staff_client(role, is_adjudicator=True), a["trial"])
        for role in ("coordinator", "reviewer")
    }
    tokens = {role: csrf_of(c) for role, c in clients.items()}
    before = _snapshot(session, b)
    problems, sent = [], 0
    for method, path, route, cap in _staff_routes(app, {"POST", "PUT", "PATCH", "DELETE"}):
        url = _url(path, route, b)
        for role, c in clients.items():
            if role not in CAPABILITIES[cap]:
                continue
            headers = {"X-CSRF-Token": tokens[role]}
            if path.startswith("/api/"):
                body = {
                    "trial": b["trial"].code,
                    "home": b["home"].code,
                    "serial": b["device"].serial,
                    "room": "hallway",
                    "label": "false_alarm",
                    "cause": "dog",
                    "attributes": {},
                }
                r = c.request(method, url, json=body, headers=headers)
            else:
                r = c.request(
                    method,
                    url,
                    data={
                        "csrf_token": tokens[role],
                        "trial": b["trial"].code,
                        "state": "withdrawn",
                        "room": "hallway",
                    },
                    headers=headers,
                    follow_redirects=False,
                )
            sent += 1
            if r.status_code >= 500 or r.status_code == 403:
                problems.append(f"{role} {method} {url}: {r.status_code} {r.text[:200]}")
            elif r.status_code < 400 and _leaks(r.text, b["markers"][1:]):
                problems.append(f"{role} {method} {url}: shows {_leaks(r.text, b['markers'])}")
    assert not problems, "\n".join(problems)
    assert sent >= 30
    assert _snapshot(session, b) == before


def test_writes_naming_the_other_trial_get_its_not_found_codes(
    staff_client, session: Session, pilots
) -> None:  # type: ignore[no-untyped-def]
    a, b = pilots["A"], pilots["B"]
    coord = _limit(session, staff_client("coordinator"), a["trial"])
    rev = _limit(session, staff_client("reviewer"), a["trial"])
    h = {"X-CSRF-Token": csrf_of(coord)}
    r = coord.post(f"/api/v1/devices/{b['device'].serial}/revoke", headers=h)
    assert r.status_code == 404
    r = coord.patch(f"/api/v1/homes/{b['home'].code}", json={"attributes": {}}, headers=h)
    assert r.status_code == 404
    r = coord.post("/api/v1/homes", json={"trial": b["trial"].code}, headers=h)
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_trial"
    r = coord.post("/api/v1/homes", json={"trial": a["trial"].code}, headers=h)
    assert r.status_code == 201 and r.json()["code"] == "H-85523", r.text  # next free code overall
    # A clash with a hidden trial's unique serial or home code is refused without a 500.
    r = coord.post(
        "/api/v1/devices",
        json={"serial": b["device"].serial, "trial": a["trial"].code, "hardware_model": "HX-1"},
        headers=h,
    )
    assert r.status_code == 409, r.text
    r = coord.post("/api/v1/homes", json={"trial": a["trial"].code, "code": b["home"].code}, headers=h)
    assert r.status_code == 409, r.text
    r = coord.post("/api/v1/homes", json={"trial": a["trial"].code}, headers=h)
    assert r.status_code == 201 and r.json()["code"] == "H-85524", r.text
    r = rev.post(
        f"/api/v1/alerts/{b['alert'].id}/verdicts",
        json={"label": "false_alarm", "cause": "dog"},
        headers={"X-CSRF-Token": csrf_of(rev)},
    )
    assert r.status_code == 404
    session.expire_all()
    assert session.get(Alert, b["alert"].id).state == "pending"  # type: ignore[union-attr]
    assert session.get(Device, b["device"].id).revoked_at is None  # type: ignore[union-attr]
