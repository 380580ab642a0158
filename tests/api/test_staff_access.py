"""The role matrix walked route by route, sign-in, CSRF, the session cookie, clip Range requests and
personal API tokens, on both backends.

Every route of the app is enumerated; each staff route must depend on ``require(<capability>)``, and
each GET route is called as every role: 403 exactly when ``server.roles.CAPABILITIES`` says no.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi import FastAPI
from fastapi.routing import APIRoute
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.app import create_app
from server.auth import service as auth_service
from server.auth.models import ApiToken
from server.deps import get_session
from server.roles import CAPABILITIES, ROLES
from tests import factories
from tests.conftest import csrf_of

PUBLIC = {
    ("GET", "/"),
    ("GET", "/login"),
    ("POST", "/login"),
    ("GET", "/api/v1/health"),
    ("GET", "/docs"),
    ("GET", "/docs/oauth2-redirect"),
    ("GET", "/openapi.json"),
    ("GET", "/redoc"),
}
DEVICE_ROUTES = {("POST", "/api/v1/heartbeats"), ("POST", "/api/v1/alerts")}  # bearer device token


def iter_routes(routes: list[Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    """(full path, route) for every route, through included routers of any FastAPI version."""
    for r in routes:
        original = getattr(r, "original_router", None)
        if original is not None:
            ctx = getattr(r, "include_context", None)
            yield from iter_routes(original.routes, prefix + (getattr(ctx, "prefix", "") or ""))
        else:
            yield prefix + getattr(r, "path", ""), r


def capabilities_of(route: APIRoute) -> list[str]:
    found: list[str] = []

    def walk(dependant: Any) -> None:
        for dep in dependant.dependencies:
            cap = getattr(dep.call, "capability", None)
            if cap is not None:
                found.append(cap)
            walk(dep)

    walk(route.dependant)
    return found


def all_routes(app: FastAPI) -> list[tuple[str, str, APIRoute | Any, list[str]]]:
    out = []
    for path, route in iter_routes(app.routes):
        methods = sorted(getattr(route, "methods", None) or [])
        for m in methods:
            if m == "HEAD":
                continue
            caps = capabilities_of(route) if isinstance(route, APIRoute) else []
            out.append((m, path, route, caps))
    return out


def test_route_enumeration_sees_the_spine_routes(app: FastAPI) -> None:
    seen = {(m, p) for m, p, _, _ in all_routes(app)}
    for expected in [
        ("GET", "/api/v1/devices"),
        ("POST", "/api/v1/alerts"),
        ("GET", "/devices/{serial}"),
        ("GET", "/clips/{alert_id}/audio"),
        ("POST", "/account/tokens"),
        ("GET", "/login"),
    ]:
        assert expected in seen


def test_every_non_public_route_requires_exactly_one_known_capability(app: FastAPI) -> None:
    problems = []
    for method, path, _, caps in all_routes(app):
        if (method, path) in PUBLIC or (method, path) in DEVICE_ROUTES:
            assert not caps, f"{method} {path} is public but names {caps}"
            continue
        if len(caps) != 1:
            problems.append(f"{method} {path}: {caps or 'no require(...)'}")
        elif caps[0] not in CAPABILITIES:
            problems.append(f"{method} {path}: unknown capability {caps[0]}")
    assert not problems, "\n".join(problems)


def test_every_capability_row_names_known_roles() -> None:
    for cap, roles in CAPABILITIES.items():
        assert roles and roles <= set(ROLES), cap


@pytest.fixture
def world(session: Session, store, settings, trial) -> dict[str, str]:  # type: ignore[no-untyped-def]
    """Objects for the path parameters, so allowed roles reach real pages."""
    dev, _ = factories.make_device(session, trial)
    home = factories.make_home(session, trial)
    now = dt.datetime.now(dt.UTC)
    inst = factories.make_installation(session, dev, home, installed_at=now - dt.timedelta(days=5))
    alert = factories.make_alert(session, store, settings, dev, detected_at=now - dt.timedelta(hours=1))
    return {
        "serial": dev.serial,
        "alert_id": str(alert.id),
        "code": home.code,
        "installation_id": str(inst.id),
        "home_id": str(home.id),
        "device_id": str(dev.id),
    }


def fill(path: str, values: dict[str, str]) -> str:
    return re.sub(r"\{(\w+)(:\w+)?\}", lambda m: values.get(m.group(1), "1"), path)


def staff_get_routes(app: FastAPI) -> list[tuple[str, str]]:
    return [
        (path, caps[0])
        for m, path, _, caps in all_routes(app)
        if m == "GET" and len(caps) == 1 and (m, path) not in PUBLIC
    ]


def test_role_matrix_on_every_get_route(app: FastAPI, staff_client, world: dict[str, str]) -> None:  # type: ignore[no-untyped-def]
    clients = {role: staff_client(role, is_adjudicator=True) for role in ROLES}
    checked, problems = 0, []
    for path, cap in staff_get_routes(app):
        url = fill(path, world)
        for role, c in clients.items():
            r = c.get(url, follow_redirects=False)
            allowed = role in CAPABILITIES[cap]
            if r.status_code >= 500:
                problems.append(f"{role} GET {url}: {r.status_code}")
            elif allowed and r.status_code in (401, 403):
                problems.append(f"{role} GET {url} ({cap}): {r.status_code} though allowed")
            elif not allowed and r.status_code != 403:
                problems.append(f"{role} GET {url} ({cap}): {r.status_code}, expected 403")
            checked += 1
    assert not problems, "\n".join(problems)
    assert checked >= 4 * 10


def test_role_matrix_on_spine_pages_gives_200_to_allowed_roles(staff_client, world: dict[str, str]) -> None:  # type: ignore[no-untyped-def]
    cases = {
        f"/devices/{world['serial']}": "devices.view",
        "/devices": "devices.view",
        "/alerts": "alerts.view",
        "/api/v1/devices": "devices.view",
        "/api/v1/alerts": "alerts.view",
        f"/api/v1/alerts/{world['alert_id']}": "alerts.view",
        f"/api/v1/alerts/{world['alert_id']}/clip": "clips.listen",
        f"/clips/{world['alert_id']}/audio": "clips.listen",
        "/account": "staff.self",
    }
    for role in ROLES:
        c = staff_client(role)
        for url, cap in cases.items():
            r = c.get(url)
            assert r.status_code == (200 if role in CAPABILITIES[cap] else 403), (role, url, r.status_code)


def test_unsafe_routes_refuse_roles_without_the_capability(
    app: FastAPI,
    staff_client,  # type: ignore[no-untyped-def]
    world: dict[str, str],
) -> None:
    """Every POST/PUT/PATCH/DELETE answers 403 to a role outside its capability (CSRF token sent)."""
    clients = {role: staff_client(role) for role in ROLES}
    tokens = {role: csrf_of(c) for role, c in clients.items()}
    problems = []
    for method, path, _, caps in all_routes(app):
        if method == "GET" or len(caps) != 1 or (method, path) in PUBLIC:
            continue
        url = fill(path, world)
        for role, c in clients.items():
            if role in CAPABILITIES[caps[0]]:
                continue
            r = c.request(method, url, headers={"X-CSRF-Token": tokens[role]}, follow_redirects=False)
            if r.status_code != 403:
                problems.append(f"{role} {method} {url} ({caps[0]}): {r.status_code}")
    assert not problems, "\n".join(problems)


def test_signed_out_pages_redirect_to_login_and_api_gives_401(
    app: FastAPI, client: TestClient, world: dict[str, str]
) -> None:
    for path, _cap in staff_get_routes(app):
        url = fill(path, world)
        r = client.get(url, follow_redirects=False)
        if path.startswith("/api/"):
            assert r.status_code == 401, (url, r.status_code)
            assert r.json()["error"]["code"] == "not_signed_in"
            assert r.headers["www-authenticate"].startswith("Bearer")
        else:
            assert r.status_code == 303, (url, r.status_code)
            assert r.headers["location"].startswith("/login?next=")
    r = client.post("/api/v1/devices", json={"serial": "X-1"})
    assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"


def test_front_page_sends_each_role_home(staff_client, client: TestClient) -> None:  # type: ignore[no-untyped-def]
    assert client.get("/", follow_redirects=False).headers["location"] == "/login"
    homes = {"admin": "/devices", "coordinator": "/homes", "reviewer": "/review", "lead": "/summary"}
    for role, where in homes.items():
        assert staff_client(role).get("/", follow_redirects=False).headers["location"] == where


# --- sign-in, cookie, CSRF ------------------------------------------------------------------------


def test_wrong_password_and_unknown_email_are_refused_alike(client: TestClient, session: Session) -> None:
    user, _ = factories.make_user(session, role="lead")
    token = csrf_of(client, "/login")
    for email, pw in ((user.email, "wrong password!"), ("nobody@example.test", "whatever pass")):
        r = client.post(
            "/login", data={"email": email, "password": pw, "csrf_token": token}, follow_redirects=False
        )
        assert r.status_code == 401
        assert "E-mail or password is not right." in r.text
    assert client.get("/api/v1/alerts").status_code == 401


def test_login_form_without_csrf_token_is_refused(client: TestClient, session: Session) -> None:
    user, pw = factories.make_user(session, role="lead")
    client.get("/login")
    r = client.post("/login", data={"email": user.email, "password": pw}, follow_redirects=False)
    assert r.status_code == 403
    assert client.get("/api/v1/alerts").status_code == 401


def _cookie_header(r: Any) -> str:
    cookies = [
        v
        for k, v in r.headers.multi_items()
        if k.lower() == "set-cookie" and v.startswith("trialhouse_session=")
    ]
    assert cookies, r.headers
    return cookies[-1].lower()


def test_session_cookie_is_httponly_and_samesite_lax(client: TestClient, session: Session) -> None:
    user, pw = factories.make_user(session, role="reviewer")
    token = csrf_of(client, "/login")
    r = client.post(
        "/login", data={"email": user.email, "password": pw, "csrf_token": token}, follow_redirects=False
    )
    assert r.status_code == 303
    cookie = _cookie_header(r)
    assert "httponly" in cookie and "samesite=lax" in cookie
    assert "secure" not in cookie.replace("samesite", "")


def test_session_cookie_is_secure_when_configured(settings, session: Session) -> None:  # type: ignore[no-untyped-def]
    secure_app = create_app(settings.model_copy(update={"secure_cookies": True}))

    def _session() -> Iterator[Session]:
        yield session

    secure_app.dependency_overrides[get_session] = _session
    user, pw = factories.make_user(session, role="reviewer")
    with TestClient(secure_app, base_url="https://testserver", raise_server_exceptions=False) as c:
        token = csrf_of(c, "/login")
        r = c.post(
            "/login", data={"email": user.email, "password": pw, "csrf_token": token}, follow_redirects=False
        )
        assert r.status_code == 303
        cookie = _cookie_header(r)
        assert "; secure" in cookie and "httponly" in cookie and "samesite=lax" in cookie
        assert c.get("/account").status_code == 200  # the Secure cookie goes back over https


def test_tampered_session_cookie_is_not_signed_in(staff_client) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("admin")
    value = c.cookies.get("trialhouse_session")
    c.cookies.clear()
    c.cookies.set("trialhouse_session", value[:-3] + ("AAA" if value[-3:] != "AAA" else "BBB"))
    assert c.get("/api/v1/devices").status_code == 401


def test_form_post_without_csrf_token_is_refused_and_with_it_succeeds(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    count = lambda: len(list(session.scalars(select(ApiToken).where(ApiToken.user_id == c.user.id))))  # noqa: E731
    r = c.post("/account/tokens", data={"label": "script"})
    assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
    r = c.post("/account/tokens", data={"label": "script", "csrf_token": "not-the-token"})
    assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
    assert count() == 0
    r = c.post("/account/tokens", data={"label": "script", "csrf_token": csrf_of(c)})
    assert r.status_code == 201
    assert re.search(r'id="new-token">ths_[\w-]+<', r.text)
    assert count() == 1


def test_refused_form_renders_an_error_page_for_browsers(staff_client) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    r = c.post("/account/tokens", data={"label": "x"}, headers={"Accept": "text/html"})
    assert r.status_code == 403 and "csrf failed" in r.text
    assert r.headers["content-type"].startswith("text/html")


def test_json_call_over_the_cookie_needs_the_csrf_header(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    r = c.post("/api/v1/devices", json={"serial": "CS-1"})
    assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
    r = c.post("/api/v1/devices", json={"serial": "CS-1"}, headers={"X-CSRF-Token": csrf_of(c)})
    assert r.status_code == 201, r.text
    assert r.json()["serial"] == "CS-1" and r.json()["token"].startswith("thd_")


def test_logout_needs_the_token_and_ends_the_session(staff_client) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("lead")
    assert c.post("/logout", follow_redirects=False).status_code == 403
    assert c.get("/api/v1/alerts").status_code == 200
    r = c.post("/logout", data={"csrf_token": csrf_of(c)}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/login"
    assert c.get("/api/v1/alerts").status_code == 401


def test_inactive_user_loses_access(staff_client, session: Session) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("admin")
    c.user.active = False
    session.flush()
    assert c.get("/api/v1/devices").status_code == 401


# --- clips: Range for listeners, nothing for others ------------------------------------------------


@pytest.fixture
def clip_alert(session: Session, store, settings, trial):  # type: ignore[no-untyped-def]
    dev, _ = factories.make_device(session, trial)
    clip = factories.sine_wav(seconds=2.0, seed=5)
    alert = factories.make_alert(session, store, settings, dev, clip=clip)
    return alert, clip


@pytest.mark.parametrize("url", ["/clips/{id}/audio", "/api/v1/alerts/{id}/clip"])
def test_clip_serves_range_requests_to_reviewers(url: str, staff_client, clip_alert) -> None:  # type: ignore[no-untyped-def]
    alert, clip = clip_alert
    c = staff_client("reviewer")
    u = url.format(id=alert.id)
    whole = c.get(u)
    assert whole.status_code == 200 and whole.content == clip
    assert whole.headers["content-type"] == "audio/wav"
    assert whole.headers.get("accept-ranges") == "bytes"
    r = c.get(u, headers={"Range": "bytes=0-99"})
    assert r.status_code == 206
    assert r.headers["content-range"] == f"bytes 0-99/{len(clip)}"
    assert r.content == clip[:100]
    r = c.get(u, headers={"Range": "bytes=1000-"})
    assert r.status_code == 206 and r.content == clip[1000:]
    assert r.headers["content-range"] == f"bytes 1000-{len(clip) - 1}/{len(clip)}"
    r = c.get(u, headers={"Range": "bytes=-44"})
    assert r.status_code == 206 and r.content == clip[-44:]
    r = c.get(u, headers={"Range": f"bytes={len(clip) + 10}-"})
    assert r.status_code == 416


@pytest.mark.parametrize("url", ["/clips/{id}/audio", "/api/v1/alerts/{id}/clip"])
def test_clip_is_refused_to_others(url: str, staff_client, client: TestClient, clip_alert) -> None:  # type: ignore[no-untyped-def]
    alert, clip = clip_alert
    u = url.format(id=alert.id)
    lead = staff_client("lead")
    r = lead.get(u, headers={"Range": "bytes=0-99"})
    assert r.status_code == 403 and r.content != clip[:100]
    r = client.get(u, headers={"Range": "bytes=0-99"}, follow_redirects=False)
    if u.startswith("/api/"):
        assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"
    else:
        assert r.status_code == 303 and r.headers["location"].startswith("/login")
    assert clip[:100] not in r.content


def test_unknown_alert_clip_is_404(staff_client) -> None:  # type: ignore[no-untyped-def]
    r = staff_client("reviewer").get("/api/v1/alerts/999999/clip")
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_alert"


# --- personal API tokens ---------------------------------------------------------------------------


def test_personal_api_token_works_for_the_staff_api(
    app: FastAPI, session: Session, world: dict[str, str]
) -> None:
    coordinator, _ = factories.make_user(session, role="coordinator")
    lead, _ = factories.make_user(session, role="lead")
    _, ctok = auth_service.create_api_token(session, coordinator, "script")
    lead_row, ltok = auth_service.create_api_token(session, lead, "report")
    with TestClient(app, raise_server_exceptions=False) as c:  # no cookie at all
        h = {"Authorization": f"Bearer {ctok}"}
        r = c.get("/api/v1/devices", headers=h)
        assert r.status_code == 200 and world["serial"] in {d["serial"] for d in r.json()}
        r = c.post("/api/v1/devices", json={"serial": "TOK-1"}, headers=h)  # no CSRF needed
        assert r.status_code == 201, r.text
        assert c.get(f"/api/v1/alerts/{world['alert_id']}/clip", headers=h).status_code == 200
        lh = {"Authorization": f"bearer {ltok}"}
        assert c.get("/api/v1/alerts", headers=lh).status_code == 200
        r = c.post("/api/v1/devices", json={"serial": "TOK-2"}, headers=lh)
        assert r.status_code == 403 and r.json()["error"]["code"] == "forbidden"
        lead_row.revoked = True
        session.flush()
        r = c.get("/api/v1/alerts", headers=lh)
        assert r.status_code == 401 and r.json()["error"]["code"] == "invalid_token"
        r = c.get("/api/v1/alerts", headers={"Authorization": "Bearer ths_made-up"})
        assert r.status_code == 401 and r.json()["error"]["code"] == "invalid_token"
        # A device token is not a staff credential.
        dev_r = c.get("/api/v1/alerts", headers={"Authorization": "Bearer thd_whatever"})
        assert dev_r.status_code == 401


def test_token_is_stored_only_as_a_digest(session: Session) -> None:
    user, _ = factories.make_user(session, role="admin")
    row, token = auth_service.create_api_token(session, user, "x")
    assert token not in (row.token_hash, row.label) and len(row.token_hash) == 64
    assert auth_service.find_user_by_api_token(session, token) is user
