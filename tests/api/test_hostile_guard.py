"""The request guard: staff calls without any credential are turned away before their body is read,
every body is capped while it streams, and every response carries the security and caching headers.
Also: the database file is private, and /openapi.json lists each route's error statuses. Both backends.
"""

from __future__ import annotations

import gc
import os
import select
import socket
import stat
import time
import tracemalloc
from pathlib import Path
from typing import Any

import anyio
import pytest
from fastapi import FastAPI
from sqlalchemy.orm import Session

from server.app import create_app
from server.auth import service as auth_service
from server.settings import Settings
from server.web.guards import inline_script_hashes
from server.web.templating import TEMPLATES_DIR
from tests import factories
from tests.conftest import LiveServer, committed_session

MIB = 1024 * 1024


def token_headers(session: Session, role: str = "admin") -> dict[str, str]:
    user, _ = factories.make_user(session, role=role)
    _, token = auth_service.create_api_token(session, user, "guard tests")
    return {"Authorization": f"Bearer {token}"}


class Asgi:
    """One request straight into the ASGI app, recording how much of the body the app pulled."""

    def __init__(self, app: FastAPI) -> None:
        self.app = app

    def call(
        self,
        method: str,
        path: str,
        headers: dict[str, str],
        chunks: list[bytes],
        content_length: bool = True,
    ) -> tuple[int, dict[str, str], bytes, int]:
        pulled = 0
        out: dict[str, Any] = {"status": None, "headers": {}, "body": b""}
        raw_headers = [(k.lower().encode(), v.encode()) for k, v in headers.items()]
        if content_length:
            raw_headers.append((b"content-length", str(sum(map(len, chunks))).encode()))
        scope = {
            "type": "http",
            "asgi": {"version": "3.0"},
            "http_version": "1.1",
            "method": method,
            "scheme": "http",
            "path": path,
            "raw_path": path.encode(),
            "query_string": b"",
            "root_path": "",
            "headers": raw_headers,
            "client": ("127.0.0.1", 5000),
            "server": ("testserver", 80),
            "state": {},
        }

        async def receive() -> dict[str, Any]:
            nonlocal pulled
            if pulled < len(chunks):
                pulled += 1
                return {"type": "http.request", "body": chunks[pulled - 1], "more_body": pulled < len(chunks)}
            return {"type": "http.disconnect"}

        async def send(message: dict[str, Any]) -> None:
            if message["type"] == "http.response.start":
                out["status"] = message["status"]
                out["headers"] = {k.decode().lower(): v.decode() for k, v in message["headers"]}
            elif message["type"] == "http.response.body":
                out["body"] += message.get("body", b"")

        anyio.run(self.app, scope, receive, send)
        return out["status"], out["headers"], out["body"], pulled


# --- caller check before the body ------------------------------------------------------------------


@pytest.mark.parametrize(
    "method, path",
    [
        ("POST", "/api/v1/homes"),
        ("PUT", "/api/v1/homes/H-1/contact"),
        ("POST", "/api/v1/homes/import"),
        ("POST", "/api/v1/gold-checks"),
        ("POST", "/api/v1/devices"),
        ("PATCH", "/api/v1/installations/7"),
    ],
)
def test_staff_call_without_credential_is_401_before_any_body_is_read(app, method, path) -> None:  # type: ignore[no-untyped-def]
    chunks = [b"{" + b" " * 65536] * 50
    status, headers, body, pulled = Asgi(app).call(method, path, {"content-type": "application/json"}, chunks)
    assert status == 401 and pulled == 0
    assert b'"not_signed_in"' in body and headers["www-authenticate"] == "Bearer"


def test_page_post_without_credential_redirects_to_sign_in_unread(app) -> None:  # type: ignore[no-untyped-def]
    status, headers, _, pulled = Asgi(app).call(
        "POST",
        "/homes/new",
        {"content-type": "application/x-www-form-urlencoded", "accept": "text/html"},
        [b"code=H-9&" * 1000],
    )
    assert status == 303 and headers["location"] == "/login?next=/homes/new" and pulled == 0


def test_public_and_device_routes_are_not_turned_away(client) -> None:  # type: ignore[no-untyped-def]
    assert client.get("/api/v1/health").status_code == 200
    assert client.get("/login").status_code == 200
    r = client.post("/api/v1/heartbeats", json={})
    assert r.status_code == 401 and r.json()["error"]["code"] == "missing_token"


def _upload_until_answered(port: int, path: str, total: int) -> tuple[int, int]:
    """POST ``total`` bytes over a raw socket, stopping once the server answers; (status, bytes sent)."""
    chunk = b" " * MIB
    sock = socket.create_connection(("127.0.0.1", port), timeout=10)
    sock.sendall(
        (
            f"POST {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
            f"Content-Length: {total}\r\n\r\n"
        ).encode()
    )
    sock.setblocking(False)
    pending, sent, answer = b"", 0, b""
    deadline = time.monotonic() + 60
    try:
        while time.monotonic() < deadline:
            readable, writable, _ = select.select([sock], [sock] if sent < total else [], [], 1.0)
            if readable:
                try:
                    data = sock.recv(65536)
                except ConnectionResetError:
                    break
                answer += data
                if b"\r\n\r\n" in answer or not data:
                    break
            if writable:
                pending = pending or chunk[: min(MIB, total - sent)]
                try:
                    n = sock.send(pending)
                except (BrokenPipeError, ConnectionResetError):
                    break
                sent += n
                pending = pending[n:]
    finally:
        sock.close()
    status = int(answer.split(b" ", 2)[1]) if answer.startswith(b"HTTP/1.1 ") else 0
    return status, sent


def test_sixty_megabyte_anonymous_post_costs_no_memory(fresh_settings: Settings) -> None:
    from server.cli_base import open_db

    open_db(fresh_settings)
    with LiveServer(fresh_settings) as srv:
        gc.collect()
        tracemalloc.start()
        try:
            before, _ = tracemalloc.get_traced_memory()
            tracemalloc.reset_peak()
            status, sent = _upload_until_answered(srv.port, "/api/v1/homes", 60 * MIB)
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
    assert status == 401
    # Measured: the server answers after the headers; what it allocates meanwhile is well under 4 MiB
    # (reading the body first, as before the guard, traced over 60 MiB).
    assert peak - before < 4 * MIB, (peak - before, sent)
    assert sent < 60 * MIB


# --- body caps -------------------------------------------------------------------------------------


def test_declared_body_over_the_limit_is_413_unread(app, session) -> None:  # type: ignore[no-untyped-def]
    headers = {**token_headers(session), "content-type": "application/json"}
    status, _, body, pulled = Asgi(app).call("POST", "/api/v1/homes", headers, [b" " * (2 * MIB)])
    assert status == 413 and b'"body_too_large"' in body and pulled == 0


def test_streamed_body_over_the_limit_is_cut_off_at_the_limit(app, session, settings) -> None:  # type: ignore[no-untyped-def]
    headers = {**token_headers(session), "content-type": "application/json"}
    chunks = [b" " * 65536] * 64  # 4 MiB, no Content-Length
    status, _, body, pulled = Asgi(app).call("POST", "/api/v1/homes", headers, chunks, content_length=False)
    assert status == 413 and b'"body_too_large"' in body
    assert pulled * 65536 <= settings.max_body_bytes + 65536  # stopped at the first chunk past the cap


def test_body_limit_is_a_setting(tmp_path: Path, work_engine) -> None:  # type: ignore[no-untyped-def]
    from fastapi.testclient import TestClient

    s = Settings(
        data_dir=tmp_path / "d",
        database_url=work_engine.url.render_as_string(hide_password=False),
        secret_key="k" * 40,
        max_body_bytes=4096,
    )
    with TestClient(create_app(s), raise_server_exceptions=False) as c:
        r = c.post(
            "/api/v1/homes",
            content=b"{" + b" " * 5000 + b"}",
            headers={"Authorization": "Bearer x", "Content-Type": "application/json"},
        )
        assert r.status_code == 413 and r.json()["error"]["code"] == "body_too_large"
        r = c.post(
            "/api/v1/homes",
            content=b"{}",
            headers={"Authorization": "Bearer x", "Content-Type": "application/json"},
        )
        assert r.status_code == 401 and r.json()["error"]["code"] in ("invalid_token", "not_signed_in")


def test_register_import_keeps_its_own_larger_limit(client, session, trial) -> None:  # type: ignore[no-untyped-def]
    rows = "code,note\n" + "".join(f"H-{i:04d},{'x' * 12_000}\n" for i in range(100))  # about 1.2 MiB
    assert len(rows) > 1024 * 1024
    r = client.post(
        f"/api/v1/homes/import?trial={trial.code}",
        content=rows.encode(),
        headers={**token_headers(session), "Content-Type": "text/csv"},
    )
    assert r.status_code in (201, 422), r.text[:300]  # read and judged as an import, not cut off
    assert r.status_code == 201 or r.json()["error"]["code"] == "import_rejected"


# --- headers ---------------------------------------------------------------------------------------


def test_pages_and_staff_json_are_not_stored_and_pages_carry_a_policy(staff_client) -> None:  # type: ignore[no-untyped-def]
    c = staff_client("admin")
    for path in ("/alerts", "/account", "/devices", "/api/v1/alerts", "/api/v1/devices", "/login"):
        r = c.get(path)
        assert r.status_code == 200, path
        assert r.headers["cache-control"] == "no-store", path
        assert r.headers["x-content-type-options"] == "nosniff"
        if r.headers["content-type"].startswith("text/html"):
            csp = r.headers["content-security-policy"]
            script_src = csp.split("script-src", 1)[1].split(";", 1)[0]
            assert "'self'" in script_src and "'unsafe-inline'" not in script_src
            assert "frame-ancestors 'none'" in csp and "object-src 'none'" in csp
    assert "content-security-policy" not in c.get("/docs").headers  # the API browser loads its own scripts


def test_clip_audio_is_not_kept_by_the_browser(staff_client, session, store, settings, trial) -> None:  # type: ignore[no-untyped-def]
    device, _ = factories.make_device(session, trial)
    alert = factories.make_alert(session, store, settings, device)
    c = staff_client("admin")
    for path in (f"/api/v1/alerts/{alert.id}/clip", f"/clips/{alert.id}/audio"):
        r = c.get(path)
        assert r.status_code == 200 and r.content[:4] == b"RIFF"
        assert r.headers["cache-control"] == "private, no-store"


def test_policy_hashes_every_static_inline_script_of_the_templates() -> None:
    scripts, handlers = inline_script_hashes(TEMPLATES_DIR)
    desk = (TEMPLATES_DIR / "review" / "_desk_script.html").read_text()
    body = desk.split("<script>", 1)[1].split("</script>", 1)[0]
    import base64
    import hashlib

    assert "'sha256-" + base64.b64encode(hashlib.sha256(body.encode()).digest()).decode() + "'" in scripts
    assert len(handlers) >= 1  # onchange="this.form.submit()" and the like


# --- files and the API description -----------------------------------------------------------------


def test_sqlite_file_and_its_log_are_private(tmp_path: Path) -> None:
    s = Settings(data_dir=tmp_path / "fresh", secret_key="p" * 40)
    from server.cli_base import open_db

    open_db(s)
    with committed_session(s) as db:
        factories.make_trial(db)
    db_file = s.data_dir / "trialhouse.db"
    found = [p for p in (db_file, Path(f"{db_file}-wal"), Path(f"{db_file}-shm")) if p.exists()]
    assert db_file in found
    for p in found:
        assert stat.S_IMODE(os.stat(p).st_mode) == 0o600, p


def test_existing_world_readable_database_is_made_private(tmp_path: Path) -> None:
    from server.db import make_engine

    f = tmp_path / "old.db"
    f.write_bytes(b"")
    f.chmod(0o644)
    make_engine(f"sqlite:///{f}").dispose()
    assert stat.S_IMODE(f.stat().st_mode) == 0o600


def test_openapi_lists_the_error_statuses_of_every_route(client) -> None:  # type: ignore[no-untyped-def]
    from server.web.guards import _iter_routes, _needs_capability

    doc = client.get("/openapi.json").json()
    assert "ErrorBody" in doc["components"]["schemas"]
    staff = {
        (m.lower(), p)
        for p, r in _iter_routes(client.app.routes)
        if _needs_capability(r)
        for m in getattr(r, "methods", ())
    }
    checked = 0
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            responses = op["responses"]
            wanted = {"503"}
            if (method, path) in staff:
                wanted |= {"401", "403"}
            if "{" in path:
                wanted |= {"404", "422"}
            if "requestBody" in op:
                wanted |= {"413", "422"}
            missing = wanted - responses.keys()
            assert not missing, (method, path, missing)
            for status, entry in responses.items():
                if status[0] in "45":
                    assert entry["content"]["application/json"]["schema"] == {
                        "$ref": "#/components/schemas/ErrorBody"
                    }, (method, path, status)
            checked += 1
    assert checked >= 40 and ("post", "/api/v1/homes") in staff
