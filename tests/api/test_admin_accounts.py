"""Admin staff-account management on both backends: pages, JSON API and the rules behind them
(temporary passwords, sessions ended on deactivation and access change, one active admin kept,
every change in the audit trail, no 500 on any input)."""

from __future__ import annotations

import re
import threading
import time

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.admin import service
from server.auth import service as auth_service
from server.auth.models import AuditEvent, User
from tests import factories
from tests.conftest import csrf_of, sign_in


def events(session: Session, action: str, object_id: int) -> list[AuditEvent]:
    return list(
        session.scalars(
            select(AuditEvent)
            .where(AuditEvent.action == action, AuditEvent.object_id == str(object_id))
            .order_by(AuditEvent.id)
        )
    )


def temp_password_of(html: str) -> str:
    m = re.search(r'<code id="temporary-password"[^>]*>([^<]+)</code>', html)
    assert m, "the page shows the temporary password"
    return m.group(1)


def health_ok(client: TestClient) -> None:
    assert client.get("/api/v1/health").status_code == 200


def signed_out(client: TestClient) -> bool:
    r = client.get("/account", follow_redirects=False)
    return r.status_code in (303, 401) and (r.status_code == 401 or "/login" in r.headers["location"])


# --- temporary passwords ---------------------------------------------------------------------------


def test_temporary_password_is_long_unambiguous_and_fresh_each_time() -> None:
    seen = {service.temporary_password() for _ in range(200)}
    assert len(seen) == 200
    for pw in seen:
        assert re.fullmatch(r"[a-zA-Z0-9]{5}(-[a-zA-Z0-9]{5}){3}", pw)
        assert not set(pw) & set("0125BIOSZilo")  # look-alike characters are never used
        auth_service.check_password_rule(pw)  # raises if the shared password rule refuses it


# --- creating accounts -----------------------------------------------------------------------------


def test_admin_adds_an_account_with_a_temporary_password_that_signs_in(
    staff_client, session: Session, app
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    r = admin.post(
        "/admin/staff",
        data={
            "email": " New.Reviewer@Example.test ",
            "name": "Rowan Tally",
            "role": "reviewer",
            "is_adjudicator": "yes",
            "csrf_token": csrf_of(admin, "/admin/staff"),
        },
    )
    assert r.status_code == 201, r.text
    assert r.headers["cache-control"] == "no-store"
    password = temp_password_of(r.text)
    user = session.scalar(select(User).where(User.email == "new.reviewer@example.test"))
    assert user is not None and user.role == "reviewer" and user.is_adjudicator and user.active
    assert user.name == "Rowan Tally"
    assert user.must_change_password is True
    created = events(session, "user.create", user.id)
    assert len(created) == 1 and created[0].actor_id == admin.user.id
    listing = admin.get("/admin/staff").text
    row = re.search(r'<tr data-email="new.reviewer@example.test".*?</tr>', listing, re.S)
    assert row and "temporary password" in row.group(0)
    with TestClient(app, raise_server_exceptions=False) as c:
        sign_in(c, "new.reviewer@example.test", password)


@pytest.mark.parametrize(
    "form, field",
    [
        ({"email": "not-an-address", "role": "reviewer"}, "email"),
        ({"email": "x@example.test", "role": "overlord"}, "role"),
        ({"email": "", "role": ""}, "role"),
        (
            {"email": "=cmd|' /C calc'!A0@x.test", "role": "lead", "name": "<script>alert(1)</script>"},
            "email",
        ),
    ],
)
def test_bad_account_form_shows_the_field_error_and_adds_nobody(
    staff_client, session: Session, form, field
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    before = session.scalar(select(User.id).order_by(User.id.desc()))
    r = admin.post("/admin/staff", data={**form, "csrf_token": csrf_of(admin, "/admin/staff")})
    assert r.status_code == 422
    assert f'id="err-{field}"' in r.text
    assert "<script>alert(1)</script>" not in r.text
    assert session.scalar(select(User.id).order_by(User.id.desc())) == before
    health_ok(admin)


def test_duplicate_email_is_refused_beside_the_field(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    other, _ = factories.make_user(session, role="lead")
    r = admin.post(
        "/admin/staff",
        data={"email": other.email.upper(), "role": "lead", "csrf_token": csrf_of(admin, "/admin/staff")},
    )
    assert r.status_code == 409
    assert 'id="err-email"' in r.text and "already exists" in r.text


def test_account_forms_need_the_csrf_token(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    target, _ = factories.make_user(session, role="reviewer")
    r = admin.post(
        "/admin/staff",
        data={"email": "z@example.test", "role": "lead"},
        headers={"accept": "application/json"},
    )
    assert r.status_code == 403
    r = admin.post(
        f"/admin/staff/{target.id}/deactivate",
        data={"csrf_token": "stale"},
        headers={"accept": "application/json"},
    )
    assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
    assert target.active


@pytest.mark.parametrize("role", ["coordinator", "reviewer", "lead"])
def test_only_admins_reach_account_and_audit_pages(staff_client, role: str) -> None:  # type: ignore[no-untyped-def]
    c = staff_client(role)
    for path in ("/admin/staff", "/admin/audit", "/admin/audit.csv", "/api/v1/users", "/api/v1/audit-events"):
        r = c.get(path, headers={"accept": "application/json"})
        assert r.status_code == 403, path
        if path.startswith("/api/"):
            assert r.json()["error"]["code"] == "forbidden"
        else:
            assert "does not allow this" in r.text
    r = c.post(
        "/api/v1/users",
        json={"email": "a@example.test", "role": "admin"},
        headers={"x-csrf-token": csrf_of(c)},
    )
    assert r.status_code == 403


# --- deactivation, access change, sessions ---------------------------------------------------------


def test_deactivation_ends_the_users_sessions_and_tokens_at_once(
    staff_client, session: Session, trial
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    coord = staff_client("coordinator")
    _, token = auth_service.create_api_token(session, coord.user, "script")
    assert coord.get("/homes").status_code == 200
    r = admin.post(
        f"/admin/staff/{coord.user.id}/deactivate",
        data={"csrf_token": csrf_of(admin, "/admin/staff")},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == f"/admin/staff/{coord.user.id}?done=deactivated"
    assert signed_out(coord)
    r = coord.get("/api/v1/devices", headers={"authorization": f"Bearer {token}"})
    assert r.status_code == 401
    page = admin.get(f"/admin/staff/{coord.user.id}?done=deactivated")
    assert "Account deactivated" in page.text and 'id="account-state">deactivated' in page.text
    [ev] = events(session, "user.deactivate", coord.user.id)
    assert ev.actor_id == admin.user.id and ev.detail["sessions_ended"] >= 1
    # Again: nothing changes, nothing new in the trail.
    r = admin.post(
        f"/admin/staff/{coord.user.id}/deactivate",
        data={"csrf_token": csrf_of(admin, "/admin/staff")},
        follow_redirects=False,
    )
    assert r.headers["location"].endswith("done=already-inactive")
    assert len(events(session, "user.deactivate", coord.user.id)) == 1
    # Reactivated, the old password works again.
    r = admin.post(
        f"/admin/staff/{coord.user.id}/reactivate",
        data={"csrf_token": csrf_of(admin, "/admin/staff")},
        follow_redirects=False,
    )
    assert r.headers["location"].endswith("done=reactivated")
    assert session.get(User, coord.user.id).active  # type: ignore[union-attr]
    assert len(events(session, "user.reactivate", coord.user.id)) == 1
    sign_in(coord, coord.user.email, factories.PASSWORD)
    assert coord.get("/homes").status_code == 200


def test_access_change_takes_effect_and_ends_sessions(staff_client, session: Session, trial) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    rev = staff_client("reviewer")
    assert rev.get("/review").status_code == 200
    assert rev.get("/api/v1/devices").status_code == 403  # reviewers work blind
    r = admin.post(
        f"/admin/staff/{rev.user.id}/access",
        data={"role": "lead", "is_adjudicator": "yes", "csrf_token": csrf_of(admin, "/admin/staff")},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"].endswith("done=access")
    user = session.get(User, rev.user.id)
    assert user is not None and user.role == "lead" and user.is_adjudicator
    assert signed_out(rev)
    [ev] = events(session, "user.access_change", rev.user.id)
    assert ev.detail["before"] == {"role": "reviewer", "is_adjudicator": False}
    assert ev.detail["after"] == {"role": "lead", "is_adjudicator": True}
    sign_in(rev, rev.user.email, factories.PASSWORD)
    assert rev.get("/review", headers={"accept": "application/json"}).status_code == 403  # leads don't review
    assert rev.get("/api/v1/devices").status_code == 200
    # The same access again is no change: no session ended, no new audit row.
    r = admin.post(
        f"/admin/staff/{rev.user.id}/access",
        data={"role": "lead", "is_adjudicator": "yes", "csrf_token": csrf_of(admin, "/admin/staff")},
        follow_redirects=False,
    )
    assert r.headers["location"].endswith("done=access-same")
    assert rev.get("/api/v1/devices").status_code == 200
    assert len(events(session, "user.access_change", rev.user.id)) == 1


def test_the_last_active_admin_cannot_leave(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    for other in session.scalars(select(User).where(User.role == "admin")):
        other.active = False  # only the admin below is active in this test
    admin = staff_client("admin")
    me = admin.user.id
    token = csrf_of(admin, "/admin/staff")
    r = admin.post(f"/admin/staff/{me}/deactivate", data={"csrf_token": token})
    assert r.status_code == 409 and "last active admin" in r.text
    r = admin.post(f"/admin/staff/{me}/access", data={"role": "coordinator", "csrf_token": token})
    assert r.status_code == 409 and 'id="problem"' in r.text
    r = admin.patch(f"/api/v1/users/{me}", json={"active": False}, headers={"x-csrf-token": token})
    assert r.status_code == 409 and r.json()["error"]["code"] == "last_admin"
    assert session.get(User, me).active and session.get(User, me).role == "admin"  # type: ignore[union-attr]
    assert events(session, "user.deactivate", me) == [] and events(session, "user.access_change", me) == []
    # With a second active admin the first may step down (and is signed out by it).
    second, _ = factories.make_user(session, role="admin")
    r = admin.post(
        f"/admin/staff/{me}/access", data={"role": "coordinator", "csrf_token": token}, follow_redirects=False
    )
    assert r.status_code == 303
    assert session.get(User, me).role == "coordinator"  # type: ignore[union-attr]
    with pytest.raises(service.LastAdmin):
        service.deactivate(session, actor="cli", user_id=second.id)


def test_admin_cannot_be_deactivated_when_the_only_other_admin_is_inactive(
    staff_client, session: Session
) -> None:  # type: ignore[no-untyped-def]
    for other in session.scalars(select(User).where(User.role == "admin")):
        other.active = False
    admin = staff_client("admin")
    dormant, _ = factories.make_user(session, role="admin")
    dormant.active = False
    session.flush()
    with pytest.raises(service.LastAdmin):
        service.change_access(session, actor=admin.user, user_id=admin.user.id, role="lead")
    # Demoting or deactivating an inactive admin is fine: it leaves the active count unchanged.
    assert service.change_access(session, actor=admin.user, user_id=dormant.id, role="lead").changed


# --- password reset ----------------------------------------------------------------------------------


def test_password_reset_prints_a_temporary_password_and_ends_sessions(
    staff_client, session: Session, app
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    coord = staff_client("coordinator")
    r = admin.post(
        f"/admin/staff/{coord.user.id}/password-reset", data={"csrf_token": csrf_of(admin, "/admin/staff")}
    )
    assert r.status_code == 200 and r.headers["cache-control"] == "no-store"
    password = temp_password_of(r.text)
    assert password not in admin.get(f"/admin/staff/{coord.user.id}").text  # shown once
    assert signed_out(coord)
    user = session.get(User, coord.user.id)
    assert user is not None and user.must_change_password
    [ev] = events(session, "user.password_set", coord.user.id)
    assert ev.actor_id == admin.user.id and ev.detail["must_change"] is True
    assert password not in str(ev.detail)
    with TestClient(app, raise_server_exceptions=False) as c:
        page = c.get("/login")
        csrf = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)  # type: ignore[union-attr]
        r = c.post(
            "/login",
            data={"email": coord.user.email, "password": factories.PASSWORD, "csrf_token": csrf},
            follow_redirects=False,
        )
        assert r.status_code != 303  # the old password no longer works
        sign_in(c, coord.user.email, password)


# --- JSON API ----------------------------------------------------------------------------------------


def test_account_api_round_trip(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    h = {"x-csrf-token": csrf_of(admin)}
    r = admin.post(
        "/api/v1/users",
        json={"email": "api.lead@example.test", "name": "Api Lead", "role": "lead"},
        headers=h,
    )
    assert r.status_code == 201 and r.headers["cache-control"] == "no-store"
    body = r.json()
    uid = body["account"]["id"]
    assert body["account"]["role"] == "lead" and body["account"]["active"] is True
    assert body["account"]["must_change_password"] is True
    auth_service.check_password_rule(body["temporary_password"])
    listed = {a["email"]: a for a in admin.get("/api/v1/users").json()}
    assert listed["api.lead@example.test"]["id"] == uid
    r = admin.patch(
        f"/api/v1/users/{uid}", json={"role": "reviewer", "is_adjudicator": True, "active": False}, headers=h
    )
    assert r.status_code == 200
    assert r.json()["changed"] is True
    acct = r.json()["account"]
    assert (acct["role"], acct["is_adjudicator"], acct["active"]) == ("reviewer", True, False)
    assert [
        e.action
        for e in session.scalars(
            select(AuditEvent)
            .where(AuditEvent.object_id == str(uid), AuditEvent.object_type == "user")
            .order_by(AuditEvent.id)
        )
    ] == ["user.create", "user.access_change", "user.deactivate"]
    r = admin.post(f"/api/v1/users/{uid}/password-reset", headers=h)
    assert r.status_code == 200 and r.json()["temporary_password"] != body["temporary_password"]
    assert admin.get(f"/api/v1/users/{uid}").json()["active"] is False


@pytest.mark.parametrize(
    "method, path, payload, status, code",
    [
        ("post", "/api/v1/users", {"email": "a@example.test", "role": "emperor"}, 422, "validation_failed"),
        ("post", "/api/v1/users", {"email": 7, "role": "lead"}, 422, "invalid_request"),
        (
            "post",
            "/api/v1/users",
            {"email": "a@example.test", "role": "lead", "is_adjudicator": "yes"},
            422,
            "invalid_request",
        ),
        ("post", "/api/v1/users", {"email": "a" * 300 + "@x.test", "role": "lead"}, 422, "invalid_request"),
        ("patch", "/api/v1/users/{uid}", {"role": "boss"}, 422, "validation_failed"),
        ("patch", "/api/v1/users/{uid}", {"active": "no"}, 422, "invalid_request"),
        ("patch", "/api/v1/users/{uid}", {"password": "x"}, 422, "invalid_request"),
        ("patch", "/api/v1/users/999999999", {"active": False}, 404, "unknown_user"),
        ("patch", "/api/v1/users/abc", {"active": False}, 422, "invalid_request"),
        ("post", "/api/v1/users/999999999/password-reset", None, 404, "unknown_user"),
        ("patch", "/api/v1/users/99999999999999999999999", {"active": False}, 422, "invalid_request"),
    ],
)
def test_account_api_rejects_bad_input_with_an_error_code(
    staff_client, session: Session, method, path, payload, status, code
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    target, _ = factories.make_user(session, role="reviewer")
    url = path.replace("{uid}", str(target.id))
    r = getattr(admin, method)(
        url, headers={"x-csrf-token": csrf_of(admin)}, **({"json": payload} if payload is not None else {})
    )
    assert r.status_code == status, r.text
    assert r.json()["error"]["code"] == code
    assert session.get(User, target.id).role == "reviewer"  # type: ignore[union-attr]
    health_ok(admin)


@pytest.mark.parametrize(
    "path",
    [
        "/admin/staff/0",
        "/admin/staff/abc",
        "/admin/staff/-1",
        "/admin/staff/1e9",
        "/admin/staff/99999999999999999999999",
    ],
)
def test_account_page_for_no_account_is_a_4xx(staff_client, path: str) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    r = admin.get(path)
    assert r.status_code in (404, 422)
    r = admin.post(path + "/deactivate", data={"csrf_token": csrf_of(admin, "/admin/staff")})
    assert r.status_code in (404, 422)


def test_two_admins_demoting_each_other_at_once_leave_one_admin(fresh_settings) -> None:  # type: ignore[no-untyped-def]
    """Committed transactions on two threads: the second waits for the first's row locks (PostgreSQL)
    or the write lock (SQLite), then sees the first demotion and is refused."""
    from server.db import make_engine, make_session_factory, writer_engine

    engine = make_engine(fresh_settings.resolved_database_url())
    factory = make_session_factory(writer_engine(engine))
    try:
        with factory() as s:
            a, _ = factories.make_user(s, role="admin")
            b, _ = factories.make_user(s, role="admin")
            s.commit()
            a_id, b_id = a.id, b.id
        holding = threading.Event()
        results: dict[str, str] = {}

        def first() -> None:
            with factory() as s:
                service.change_access(s, actor="cli", user_id=b_id, role="lead")
                holding.set()
                time.sleep(0.6)  # the other demotion starts while this one holds its locks
                s.commit()
                results["first"] = "demoted"

        def second() -> None:
            holding.wait(10)
            with factory() as s:
                try:
                    service.change_access(s, actor="cli", user_id=a_id, role="lead")
                    s.commit()
                    results["second"] = "demoted"
                except service.LastAdmin:
                    s.rollback()
                    results["second"] = "last_admin"

        threads = [threading.Thread(target=first), threading.Thread(target=second)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(30)
        assert results == {"first": "demoted", "second": "last_admin"}
        with factory() as s:
            assert s.scalars(select(User.id).where(User.role == "admin", User.active.is_(True))).all() == [
                a_id
            ]
    finally:
        engine.dispose()


@pytest.mark.parametrize(
    "form, field",
    [
        ({"email": "nul\x00@example.test", "role": "lead"}, "email"),
        ({"email": "tab@example.test", "role": "lead", "name": "Ann\x00Lee"}, "name"),
        ({"email": "long@example.test", "role": "lead", "name": "n" * 201}, "name"),
        ({"email": "a" * 250 + "@example.test", "role": "lead"}, "email"),
    ],
)
def test_names_and_addresses_the_database_cannot_hold_are_field_errors(
    staff_client, session: Session, form, field
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    r = admin.post("/admin/staff", data={**form, "csrf_token": csrf_of(admin, "/admin/staff")})
    assert r.status_code == 422 and f'id="err-{field}"' in r.text
    r = admin.post("/api/v1/users", json=form, headers={"x-csrf-token": csrf_of(admin)})
    assert r.status_code == 422 and r.json()["error"]["code"] in ("validation_failed", "invalid_request")
    health_ok(admin)


@pytest.mark.parametrize("param", ["actor", "action", "home", "object_type", "object_id"])
def test_control_characters_in_trail_filters_are_field_errors(staff_client, param: str) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    params = {param: "a\x00b", "object_type": "user"} if param == "object_id" else {param: "a\x00b"}
    r = admin.get("/admin/audit", params=params)
    assert r.status_code == 422 and f'id="err-{param}"' in r.text
    r = admin.get("/api/v1/audit-events", params=params)
    assert r.status_code == 422 and param in r.json()["error"]["fields"]
    assert admin.get("/admin/audit.csv", params=params).status_code == 422
