"""Personal API tokens: expiry chosen at creation, listing with last use, revocation, on the
account page (shown once, never cached) and as JSON."""

from __future__ import annotations

import datetime as dt
import re

from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.auth import service as auth_service
from server.auth.models import ApiToken, AuditEvent
from tests.conftest import csrf_of

T0 = dt.datetime(2026, 11, 2, 9, 0, tzinfo=dt.UTC)


class Clock:
    def __init__(self, at: dt.datetime = T0) -> None:
        self.at = at

    def __call__(self) -> dt.datetime:
        return self.at

    def advance(self, **kw: float) -> None:
        self.at += dt.timedelta(**kw)


def _bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def test_account_page_creates_a_token_with_its_expiry_and_shows_it_once(
    app, staff_client, session: Session
) -> None:  # type: ignore[no-untyped-def]
    clock = Clock()
    app.state.auth_clock = clock
    c = staff_client("coordinator")
    r = c.post("/account/tokens", data={"label": "nightly export", "days": "30", "csrf_token": csrf_of(c)})
    assert r.status_code == 201 and r.headers["cache-control"] == "no-store"
    token = re.search(r'id="new-token">(ths_[A-Za-z0-9_-]+)<', r.text).group(1)  # type: ignore[union-attr]
    row = session.scalar(select(ApiToken).where(ApiToken.label == "nightly export"))
    assert row is not None and row.user_id == c.user.id
    assert row.created_at == T0 and row.expires_at == T0 + dt.timedelta(days=30)
    page = c.get("/account")
    assert page.headers["cache-control"] == "no-store"
    assert token not in page.text and "nightly export" in page.text and "2026-12-02 09:00" in page.text
    # The default lifetime is the setting (90 days); the offered choices never pass the maximum.
    r = c.post("/account/tokens", data={"label": "default", "csrf_token": csrf_of(c)})
    assert r.status_code == 201
    assert session.scalar(
        select(ApiToken).where(ApiToken.label == "default")
    ).expires_at == T0 + dt.timedelta(days=90)  # type: ignore[union-attr]
    r = c.post("/account/tokens", data={"label": "too long", "days": "400", "csrf_token": csrf_of(c)})
    assert r.status_code == 422 and "from 1 to 365 days" in r.text
    assert session.scalar(select(ApiToken).where(ApiToken.label == "too long")) is None
    [ev] = session.scalars(
        select(AuditEvent).where(AuditEvent.action == "api_token.create", AuditEvent.object_id == str(row.id))
    ).all()
    assert ev.actor_id == c.user.id and ev.detail["expires_at"].startswith("2026-12-02T09:00")


def test_last_use_expiry_and_revocation_over_the_api(app, staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    clock = Clock()
    app.state.auth_clock = clock
    # The browser session that manages the tokens outlives the week this test walks through.
    app.state.settings.session_idle_s = app.state.settings.session_max_age_s = 30 * 86400
    c = staff_client("lead")
    h = {"x-csrf-token": csrf_of(c)}
    r = c.post("/api/v1/account/tokens", json={"label": "report script", "days": 7}, headers=h)
    assert r.status_code == 201, r.text
    body = r.json()
    token, tid = body["secret"], body["token"]["id"]
    assert body["token"]["state"] == "live" and body["token"]["last_used_at"] is None
    assert body["token"]["expires_at"].startswith("2026-11-09T09:00:00")
    with TestClient(app, raise_server_exceptions=False) as script:
        clock.advance(hours=1)
        assert script.get("/api/v1/account/tokens", headers=_bearer(token)).status_code == 200
        listed = {t["id"]: t for t in c.get("/api/v1/account/tokens").json()["tokens"]}
        assert listed[tid]["last_used_at"].startswith("2026-11-02T10:00:00")
        clock.advance(seconds=30)  # within a minute: last use not rewritten
        assert script.get("/summary", headers=_bearer(token)).status_code in (200, 404)
        assert session.get(ApiToken, tid).last_used_at == T0 + dt.timedelta(hours=1)  # type: ignore[union-attr]
        clock.advance(seconds=31)
        assert script.get("/api/v1/account/tokens", headers=_bearer(token)).status_code == 200
        assert session.get(ApiToken, tid).last_used_at == T0 + dt.timedelta(hours=1, seconds=61)  # type: ignore[union-attr]
        # A token may not mint tokens.
        r = script.post("/api/v1/account/tokens", json={"label": "child"}, headers=_bearer(token))
        assert r.status_code == 403 and r.json()["error"]["code"] == "forbidden"
        # Expiry: the last second before works, the expiry instant does not.
        clock.at = T0 + dt.timedelta(days=7) - dt.timedelta(seconds=1)
        assert script.get("/api/v1/account/tokens", headers=_bearer(token)).status_code == 200
        clock.at = T0 + dt.timedelta(days=7)
        r = script.get("/api/v1/account/tokens", headers=_bearer(token))
        assert r.status_code == 401 and r.json()["error"]["code"] == "token_expired"
        assert "invalid_token" in r.headers["www-authenticate"]
        assert {t["id"]: t for t in c.get("/api/v1/account/tokens").json()["tokens"]}[tid][
            "state"
        ] == "expired"
        # Revocation of a second, live token.
        r = c.post("/api/v1/account/tokens", json={"label": "second"}, headers=h)
        token2, tid2 = r.json()["secret"], r.json()["token"]["id"]
        assert script.get("/api/v1/account/tokens", headers=_bearer(token2)).status_code == 200
        r = c.delete(f"/api/v1/account/tokens/{tid2}", headers=h)
        assert r.status_code == 200 and r.json()["state"] == "revoked" and r.json()["revoked_at"]
        r = script.get("/api/v1/account/tokens", headers=_bearer(token2))
        assert r.status_code == 401 and r.json()["error"]["code"] == "invalid_token"
        assert c.delete(f"/api/v1/account/tokens/{tid2}", headers=h).status_code == 200  # again: no change
    events = session.scalars(
        select(AuditEvent).where(AuditEvent.action == "api_token.revoke", AuditEvent.object_id == str(tid2))
    ).all()
    assert len(events) == 1 and events[0].actor_id == c.user.id


def test_only_the_owner_or_an_admin_revokes(app, staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    owner = staff_client("reviewer")
    other = staff_client("coordinator")
    admin = staff_client("admin")
    row, token = auth_service.create_api_token(session, owner.user, "desk helper")
    session.commit()
    r = other.delete(f"/api/v1/account/tokens/{row.id}", headers={"x-csrf-token": csrf_of(other)})
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_token"
    assert other.get("/api/v1/account/tokens").json()["tokens"] == []  # nobody else's tokens listed
    r = other.post(
        f"/account/tokens/{row.id}/revoke", data={"csrf_token": csrf_of(other)}, follow_redirects=False
    )
    assert r.status_code == 404
    assert session.get(ApiToken, row.id).revoked is False  # type: ignore[union-attr]
    assert [t.id for t in auth_service.list_api_tokens(session, owner.user.id)] == [row.id]
    revoked = auth_service.revoke_api_token(session, row.id, by=admin.user)
    session.commit()
    assert revoked.revoked and revoked.revoked_at is not None
    with TestClient(app, raise_server_exceptions=False) as script:
        assert script.get("/api/v1/account/tokens", headers=_bearer(token)).status_code == 401


def test_account_page_revokes_a_token(app, staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    row, token = auth_service.create_api_token(session, c.user, "spreadsheet link", days=10)
    session.commit()
    page = c.get("/account")
    assert f'data-token-id="{row.id}"' in page.text and "never" in page.text
    r = c.post(f"/account/tokens/{row.id}/revoke", data={"csrf_token": csrf_of(c)}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/account?done=token-revoked"
    page = c.get("/account?done=token-revoked")
    assert "Token revoked" in page.text and 'tag bad">revoked' in page.text
    with TestClient(app, raise_server_exceptions=False) as script:
        assert script.get("/api/v1/account/tokens", headers=_bearer(token)).status_code == 401


def test_token_api_validates_its_body(staff_client) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("lead")
    h = {"x-csrf-token": csrf_of(c)}
    for body, code in [
        ({"label": "x", "days": 0}, "invalid_request"),
        ({"label": ""}, "invalid_request"),
        ({"label": "x", "days": "30"}, "invalid_request"),
        ({"label": "x", "days": 366}, "validation_failed"),
    ]:
        r = c.post("/api/v1/account/tokens", json=body, headers=h)
        assert r.status_code == 422 and r.json()["error"]["code"] == code, (body, r.text)
    assert c.get("/api/v1/account/tokens").json()["tokens"] == []
