"""Server-side staff sessions: sign-out, password change and deactivation end them at once; idle
and absolute limits; the cookie holds only a random id; CSRF tokens live in the session row."""

from __future__ import annotations

import datetime as dt
import hashlib
import re

from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.auth import service as auth_service
from server.auth.models import AuditEvent, StaffSession, User
from server.auth.sessions import COOKIE_NAME
from tests import factories
from tests.conftest import csrf_of, sign_in

T0 = dt.datetime(2026, 11, 2, 9, 0, tzinfo=dt.UTC)
JSON = {"accept": "application/json"}


class Clock:
    def __init__(self, at: dt.datetime = T0) -> None:
        self.at = at

    def __call__(self) -> dt.datetime:
        return self.at

    def advance(self, **kw: float) -> None:
        self.at += dt.timedelta(**kw)


def _clocked(app) -> Clock:  # type: ignore[no-untyped-def]
    clock = Clock()
    app.state.auth_clock = clock
    return clock


def _client_with_cookie(app, value: str) -> TestClient:  # type: ignore[no-untyped-def]
    c = TestClient(app, raise_server_exceptions=False)
    c.cookies.set(COOKIE_NAME, value)
    return c


def _signed_in(app, user: User, password: str = factories.PASSWORD) -> TestClient:  # type: ignore[no-untyped-def]
    c = TestClient(app, raise_server_exceptions=False)
    c.__enter__()
    sign_in(c, user.email, password)
    return c


def _row_of(session: Session, cookie: str) -> StaffSession:
    row = session.scalar(
        select(StaffSession)
        .where(StaffSession.token_hash == hashlib.sha256(cookie.encode()).hexdigest())
        .execution_options(populate_existing=True)
    )
    assert row is not None
    return row


def test_a_cookie_copied_before_sign_out_is_refused_after(app, staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    cookie = c.cookies.get(COOKIE_NAME)
    assert cookie and len(cookie) >= 40
    row = _row_of(session, cookie)
    # The cookie is only the id: the user, the CSRF token and the times stay on the server.
    assert re.fullmatch(r"[A-Za-z0-9_-]{43}", cookie) and row.user_id == c.user.id  # 32 random bytes
    assert cookie not in {row.token_hash, row.csrf_token}
    with _client_with_cookie(app, cookie) as copy:
        assert copy.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        r = c.post("/logout", data={"csrf_token": csrf_of(c)}, follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"] == "/login"
        assert COOKIE_NAME not in c.cookies  # the browser was told to drop it
        r = copy.get("/api/v1/account/tokens", headers=JSON)
        assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"
        r = copy.get("/account", follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"].startswith("/login")
        # The answer also deletes the dead cookie.
        assert any(
            h.startswith(f"{COOKIE_NAME}=") and "Max-Age=0" in h for h in r.headers.get_list("set-cookie")
        )
    row = _row_of(session, cookie)
    assert row.revoked_at is not None and row.end_reason == "signed_out"
    events = session.scalars(
        select(AuditEvent).where(AuditEvent.action == "auth.sign_out", AuditEvent.object_id == str(c.user.id))
    ).all()
    assert len(events) == 1 and events[0].actor_id == c.user.id


def test_each_sign_in_gets_its_own_session_and_the_front_page_knows_it(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="reviewer")
    a, b = _signed_in(app, user), _signed_in(app, user)
    try:
        assert a.cookies.get(COOKIE_NAME) != b.cookies.get(COOKIE_NAME)
        r = a.get("/", follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"] == "/review"
        with TestClient(app, raise_server_exceptions=False) as anon:
            assert anon.get("/", follow_redirects=False).headers["location"] == "/login"
        live = auth_service.live_sessions(
            session,
            user.id,
            now=dt.datetime.now(dt.UTC),
            limits=__import__("server.deps", fromlist=["x"]).session_limits(app.state.settings),
        )
        assert len(live) == 2
    finally:
        a.__exit__(None, None, None)
        b.__exit__(None, None, None)


def test_changing_ones_password_ends_the_other_sessions(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="lead")
    a, b = _signed_in(app, user), _signed_in(app, user)
    try:
        old_a = a.cookies.get(COOKIE_NAME)
        new_password = "plum orchard at dusk 7"
        r = a.post(
            "/account/password",
            data={
                "current_password": factories.PASSWORD,
                "new_password": new_password,
                "repeat_password": new_password,
                "csrf_token": csrf_of(a),
            },
            follow_redirects=False,
        )
        assert r.status_code == 303 and r.headers["location"] == "/account?done=password"
        assert a.cookies.get(COOKIE_NAME) != old_a  # a fresh session for the browser that changed it
        assert a.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        assert b.get("/api/v1/account/tokens", headers=JSON).status_code == 401
        assert _row_of(session, old_a).end_reason == "password_changed"
        [ev] = session.scalars(
            select(AuditEvent).where(
                AuditEvent.action == "user.password_set", AuditEvent.object_id == str(user.id)
            )
        ).all()
        assert ev.detail["sessions_ended"] == 2 and new_password not in str(ev.detail)
        with TestClient(app, raise_server_exceptions=False) as c:
            sign_in(c, user.email, new_password)
    finally:
        a.__exit__(None, None, None)
        b.__exit__(None, None, None)


def test_a_wrong_current_password_or_a_weak_new_one_changes_nothing(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="lead")
    a = _signed_in(app, user)
    try:
        cases = [
            ("not my password at all", "a fine new password 9", "a fine new password 9", "current_password"),
            (factories.PASSWORD, "Password1234", "Password1234", "commonly used"),
            (factories.PASSWORD, "short one", "short one", "at least 12"),
            (factories.PASSWORD, "a fine new password 9", "a fine new password 8", "differ"),
        ]
        for current, new, repeat, expect in cases:
            r = a.post(
                "/account/password",
                data={
                    "current_password": current,
                    "new_password": new,
                    "repeat_password": repeat,
                    "csrf_token": csrf_of(a),
                },
            )
            assert r.status_code == 422, (expect, r.text)
            assert expect in r.text or expect == "current_password"
            assert r.headers["cache-control"] == "no-store"
        assert a.get("/api/v1/account/tokens", headers=JSON).status_code == 200  # still signed in
        assert auth_service.authenticate(session, user.email, factories.PASSWORD) is not None
    finally:
        a.__exit__(None, None, None)


def test_end_sessions_and_deactivation_sign_the_user_out_at_once(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="coordinator")
    a, b = _signed_in(app, user), _signed_in(app, user)
    other, _ = factories.make_user(session, role="coordinator")
    c = _signed_in(app, other)
    try:
        assert auth_service.end_sessions(session, user.id, reason="deactivated") == 2
        session.commit()
        assert auth_service.end_sessions(session, user.id, reason="deactivated") == 0
        for x in (a, b):
            assert x.get("/api/v1/account/tokens", headers=JSON).status_code == 401
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200  # someone else's untouched
        # A deactivated account's live session counts for nothing even before it is ended.
        other.active = False
        session.commit()
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 401
    finally:
        for x in (a, b, c):
            x.__exit__(None, None, None)


def test_set_password_checks_the_rule_and_ends_sessions(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="reviewer")
    a = _signed_in(app, user)
    try:
        import pytest

        from server.errors import ValidationFailed

        with pytest.raises(ValidationFailed) as info:
            auth_service.set_password(session, user, "letmein12345")
        assert "password" in info.value.errors
        assert a.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        auth_service.set_password(session, user, "granite lantern ferry", must_change=True)
        session.commit()
        assert user.must_change_password is True
        assert a.get("/api/v1/account/tokens", headers=JSON).status_code == 401
        # Until they choose their own, only their account page answers.
        with TestClient(app, raise_server_exceptions=False) as c:
            page = c.get("/login")
            csrf = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)  # type: ignore[union-attr]
            r = c.post(
                "/login",
                data={"email": user.email, "password": "granite lantern ferry", "csrf_token": csrf},
                follow_redirects=False,
            )
            assert r.status_code == 303 and r.headers["location"] == "/account"
            r = c.get("/review")
            assert r.status_code == 403 and "choose your own on your account page" in r.text
            assert c.get("/account").status_code == 200
            r = c.post(
                "/account/password",
                data={
                    "current_password": "granite lantern ferry",
                    "new_password": "my own choice of words",
                    "repeat_password": "my own choice of words",
                    "csrf_token": csrf_of(c),
                },
                follow_redirects=False,
            )
            assert r.status_code == 303
            assert c.get("/review").status_code == 200
    finally:
        a.__exit__(None, None, None)


def test_idle_limit_and_activity_written_at_most_once_a_minute(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    clock = _clocked(app)
    app.state.settings.session_idle_s = 30 * 60
    user, _ = factories.make_user(session, role="lead")
    c = _signed_in(app, user)
    try:
        cookie = c.cookies.get(COOKIE_NAME)
        assert _row_of(session, cookie).last_seen_at == T0
        clock.advance(seconds=30)
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        assert _row_of(session, cookie).last_seen_at == T0  # under a minute: no write
        clock.advance(minutes=29)  # 29.5 min idle on the books (the last write was at T0)
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        assert _row_of(session, cookie).last_seen_at == T0 + dt.timedelta(minutes=29, seconds=30)
        clock.advance(minutes=29, seconds=59)
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        clock.advance(minutes=30)  # exactly the idle limit since the last request
        r = c.get("/api/v1/account/tokens", headers=JSON)
        assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"
        assert _row_of(session, cookie).revoked_at is None  # lapsed, not ended: the limit decides
    finally:
        c.__exit__(None, None, None)


def test_absolute_limit_ends_even_a_busy_session(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    clock = _clocked(app)
    app.state.settings.session_max_age_s = 12 * 3600
    user, _ = factories.make_user(session, role="lead")
    c = _signed_in(app, user)
    try:
        for _ in range(12 * 3 - 1):  # a request every 20 minutes for 11 h 40 min
            clock.advance(minutes=20)
            assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        clock.advance(minutes=19, seconds=59)
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 200
        clock.advance(seconds=1)  # 12 h after sign-in
        assert c.get("/api/v1/account/tokens", headers=JSON).status_code == 401
    finally:
        c.__exit__(None, None, None)


def test_csrf_token_lives_in_the_session_row(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="lead")
    with TestClient(app, raise_server_exceptions=False) as c:
        before = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/login").text).group(1)  # type: ignore[union-attr]
        r = c.post(
            "/login",
            data={"email": user.email, "password": factories.PASSWORD, "csrf_token": before},
            follow_redirects=False,
        )
        assert r.status_code == 303
        row = _row_of(session, c.cookies.get(COOKIE_NAME))
        assert csrf_of(c) == row.csrf_token != before
        # The sign-in form's token does not work for a signed-in form.
        r = c.post("/account/tokens", data={"label": "x", "csrf_token": before})
        assert r.status_code == 403 and "security token" in r.text
        r = c.post("/api/v1/account/tokens", json={"label": "x"}, headers={"x-csrf-token": "nope"})
        assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
        r = c.post("/api/v1/account/tokens", json={"label": "x"}, headers={"x-csrf-token": row.csrf_token})
        assert r.status_code == 201


def test_long_dead_session_rows_are_purged_at_the_next_sign_in(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    clock = _clocked(app)
    user, _ = factories.make_user(session, role="lead")
    a = _signed_in(app, user)
    old_cookie = a.cookies.get(COOKIE_NAME)
    a.post("/logout", data={"csrf_token": csrf_of(a)})
    a.__exit__(None, None, None)
    clock.advance(days=29)
    b = _signed_in(app, user)
    b.__exit__(None, None, None)
    assert _row_of(session, old_cookie).revoked_at == T0  # kept 30 days after it ended
    clock.advance(days=2)
    c = _signed_in(app, user)
    c.__exit__(None, None, None)
    assert (
        session.scalar(
            select(StaffSession).where(
                StaffSession.token_hash == hashlib.sha256(old_cookie.encode()).hexdigest()
            )
        )
        is None
    )
    assert len(session.scalars(select(StaffSession).where(StaffSession.user_id == user.id)).all()) == 2
