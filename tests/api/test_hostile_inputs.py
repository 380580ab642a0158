"""Hostile input never reaches a server error: deep nesting, lone surrogates, integers past 64 bits,
forms where a file is expected, loose JSON types; and strict staff JSON, on both backends."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session

from server.auth import service as auth_service
from tests import factories
from tests.conftest import csrf_of

BOUNDARY = "hostile-7c1d"
BIG = 2**63
NOW = dt.datetime.now(dt.UTC).replace(microsecond=0)


def token_headers(session: Session, role: str = "admin") -> dict[str, str]:
    user, _ = factories.make_user(session, role=role)
    _, token = auth_service.create_api_token(session, user, "hostile tests")
    return {"Authorization": f"Bearer {token}"}


def assert_client_error(r: Any, status: int | tuple[int, ...], code: str | None = None) -> dict[str, Any]:
    statuses = (status,) if isinstance(status, int) else status
    assert r.status_code in statuses, (r.status_code, r.text[:300])
    body = r.json()
    assert isinstance(body["error"]["code"], str) and body["error"]["message"]
    if code is not None:
        assert body["error"]["code"] == code, body
    return body


def assert_healthy(client: TestClient) -> None:
    r = client.get("/api/v1/health")
    assert r.status_code == 200, r.text


def multipart(meta_raw: bytes, clip: bytes) -> bytes:
    def part(name: str, body: bytes) -> bytes:
        head = f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n'
        return head.encode() + body + b"\r\n"

    return part("meta", meta_raw) + part("clip", clip) + f"--{BOUNDARY}--\r\n".encode()


def post_json(
    client: TestClient, path: str, raw: str | bytes, headers: dict[str, str], method: str = "POST"
) -> Any:
    return client.request(
        method,
        path,
        content=raw if isinstance(raw, bytes) else raw.encode(),
        headers={**headers, "Content-Type": "application/json"},
    )


# --- the four inputs named in the issue ------------------------------------------------------------


def test_device_meta_nested_a_thousand_deep_is_invalid_meta(client, session, trial) -> None:  # type: ignore[no-untyped-def]
    _, token = factories.make_device(session, trial)
    deep = ("[" * 1000 + "]" * 1000).encode()
    raw = b'{"event_id": "deep-1", "x": ' + deep + b"}"
    r = client.post(
        "/api/v1/alerts",
        content=multipart(raw, factories.sine_wav()),
        headers={
            "Authorization": f"Bearer {token}",
            "Content-Type": f"multipart/form-data; boundary={BOUNDARY}",
        },
    )
    assert_client_error(r, 422, "invalid_meta")
    assert_healthy(client)


def test_staff_json_nested_deep_is_a_client_error(client, session) -> None:  # type: ignore[no-untyped-def]
    headers = token_headers(session)
    raw = '{"code": "H-DEEP", "attributes": {"a": ' + "[" * 5000 + "]" * 5000 + "}}"
    r = post_json(client, "/api/v1/homes", raw, headers)
    assert_client_error(r, (400, 422))
    assert_healthy(client)


@pytest.mark.parametrize(
    "path, raw",
    [
        ("/api/v1/homes", '{"code": "H-\\ud800"}'),
        ("/api/v1/homes", '{"note": "\\udfff alone"}'),
        ("/api/v1/attributes", '{"key": "k\\ud800", "label": "x", "kind": "text"}'),
    ],
)
def test_lone_surrogate_in_staff_json_is_invalid_request(client, session, trial, path, raw) -> None:  # type: ignore[no-untyped-def]
    headers = token_headers(session)
    r = post_json(client, path, raw, headers)
    assert_client_error(r, (404, 409, 422))
    assert_healthy(client)


def test_lone_surrogate_in_a_path_is_not_a_server_error(client, session) -> None:  # type: ignore[no-untyped-def]
    headers = token_headers(session)
    r = client.get("/api/v1/homes/%ED%A0%80", headers=headers)
    assert_client_error(r, (404, 422))
    r = client.put(
        "/api/v1/homes/H-1/contact",
        content=b'{"names": "\\ud800"}',
        headers={**headers, "Content-Type": "application/json"},
    )
    assert_client_error(r, (404, 422))


@pytest.mark.parametrize(
    "path",
    [
        f"/api/v1/alerts/{BIG}",
        f"/api/v1/alerts/{BIG * 4}",
        f"/api/v1/alerts/-{BIG + 1}",
        f"/api/v1/alerts/{BIG}/clip",
        f"/api/v1/review/items/{BIG}",
        f"/api/v1/alerts?offset={BIG}",
    ],
)
def test_integers_past_64_bits_in_paths_are_client_errors(client, session, path) -> None:  # type: ignore[no-untyped-def]
    r = client.get(path, headers=token_headers(session))
    assert_client_error(r, (404, 422))
    assert_healthy(client)


@pytest.mark.parametrize(
    "method, path, body",
    [
        ("POST", "/api/v1/gold-checks", {"alert_id": BIG, "expected_label": "confirmed"}),
        (
            "POST",
            "/api/v1/attributes",
            {"key": "rooms", "label": "Rooms", "kind": "number", "min_value": BIG},
        ),
        ("POST", "/api/v1/quota/targets", {"min_count": BIG, "label": "big"}),
        ("DELETE", f"/api/v1/quota/targets/{BIG}", None),
        ("POST", f"/api/v1/installations/{BIG}/removal", {"removed_at": "2026-03-01T00:00:00Z"}),
        ("DELETE", f"/api/v1/staged-events/{BIG}", None),
    ],
)
def test_integers_past_64_bits_in_bodies_are_client_errors(  # type: ignore[no-untyped-def]
    client, session, trial, method, path, body
) -> None:
    r = client.request(method, path, json=body, headers=token_headers(session))
    assert_client_error(r, (404, 409, 422))
    assert_healthy(client)


def test_form_post_to_the_homes_import_over_a_cookie_session_is_415(staff_client, trial) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("coordinator")
    token = csrf_of(c)
    r = c.post(f"/api/v1/homes/import?trial={trial.code}", data={"csrf_token": token, "file": "code\nH-1\n"})
    assert_client_error(r, 415, "unsupported_media_type")
    r = c.post(f"/api/v1/homes/import?trial={trial.code}", data={"file": "code\nH-1\n"})
    assert_client_error(r, (403, 415))
    assert_healthy(c)


# --- strict staff JSON ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "field, value",
    [
        ("consented_on", 1_767_225_600),  # an epoch number is not a date
        ("consented_on", "2026-01-02T00:00:00Z"),
        ("retention_days", False),  # false is not 0
        ("retention_days", "90"),  # a numeric string is not a number
        ("retention_days", 90.5),
        ("staff_may_listen", 0),
        ("staff_may_listen", "yes"),
        ("at", 1_767_225_600),
        ("at", "2026-01-02T00:00:00"),  # no offset
    ],
)
def test_staff_json_is_strict(client, session, trial, field, value) -> None:  # type: ignore[no-untyped-def]
    headers = token_headers(session)
    home = factories.make_home(session, trial, state="candidate")
    body: dict[str, Any] = {"form_version": "v1", "consented_on": "2026-01-02"}
    body[field] = value
    r = client.post(f"/api/v1/homes/{home.code}/consents", json=body, headers=headers)
    err = assert_client_error(r, 422, "invalid_request")
    assert err["error"]["field"] == field


def test_strict_staff_json_still_takes_proper_values(client, session, trial) -> None:  # type: ignore[no-untyped-def]
    headers = token_headers(session)
    home = factories.make_home(session, trial, state="candidate")
    r = client.post(
        f"/api/v1/homes/{home.code}/consents",
        headers=headers,
        json={
            "form_version": "v1",
            "consented_on": "2026-01-02",
            "retention_days": 30,
            "staff_may_listen": False,
            "at": (NOW - dt.timedelta(hours=1)).isoformat(),
        },
    )
    assert r.status_code == 201, r.text
    assert r.json()["retention_days"] == 30 and r.json()["staff_may_listen"] is False


@pytest.mark.parametrize(
    "raw",
    [
        '{"started_at": 1767225600, "ended_at": "2026-01-01T00:10:00Z", "home": "H",'
        ' "sound_class": "x", "source": "s"}',
        '{"started_at": "2026-01-01T00:00:00Z", "ended_at": "2026-01-01T00:10:00Z", "home": "H",'
        ' "sound_class": "x", "source": "s", "level_db": NaN}',
        '{"started_at": "2026-01-01T00:00:00Z", "ended_at": "2026-01-01T00:10:00Z", "home": "H",'
        ' "sound_class": "x", "source": "s", "level_db": true}',
    ],
)
def test_staged_event_times_and_levels_are_strict(client, session, raw) -> None:  # type: ignore[no-untyped-def]
    r = post_json(client, "/api/v1/staged-events", raw, token_headers(session))
    assert_client_error(r, 422, "invalid_request")


@pytest.mark.parametrize(
    "body",
    [
        {"alert_id": "1", "expected_label": "confirmed"},
        {"alert_id": True, "expected_label": "confirmed"},
        {"alert_id": 1.0, "expected_label": "confirmed"},
    ],
)
def test_review_json_is_strict(client, session, body) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/api/v1/gold-checks", json=body, headers=token_headers(session))
    assert_client_error(r, 422, "invalid_request")


def test_nul_in_staff_text_is_not_a_server_error(client, session, trial) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/api/v1/homes", headers=token_headers(session), json={"trial": trial.code, "note": "nul \x00 inside"}
    )
    assert r.status_code < 500, r.text
    assert_healthy(client)


def test_device_register_is_strict(client, session) -> None:  # type: ignore[no-untyped-def]
    r = post_json(client, "/api/v1/devices", json.dumps({"serial": 12345}), token_headers(session))
    assert_client_error(r, 422, "invalid_request")
