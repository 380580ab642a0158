"""Storage faults answer 503 with a storage code and Retry-After, leave the connection usable, and
show in GET /api/v1/health: a full disk, a read-only database, an unwritable clip store. Both backends.

Faults are made without root tricks (tests run as root, and chmod does not stop root): SQLite's
page limit and query_only pragma, PostgreSQL read-only transactions and a trigger raising the
disk-full SQLSTATE, and the clip store's or os.statvfs's answers replaced by OSError(ENOSPC/EACCES).
"""

from __future__ import annotations

import datetime as dt
import errno
import http.client
import json
import os
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import event, text

from server.auth import service as auth_service
from server.cli_base import open_db
from server.devices.clipstore import ClipStore
from server.settings import Settings
from server.trials import service as trials_service
from tests import factories
from tests.conftest import LiveServer, committed_session

BOUNDARY = "faults-31b"


class World:
    def __init__(self, srv: LiveServer, staff_token: str, device_token: str) -> None:
        self.srv, self.staff_token, self.device_token = srv, staff_token, device_token
        self.conn = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=30)
        self.staff_json = {"Authorization": f"Bearer {staff_token}", "Content-Type": "application/json"}

    def request(
        self, method: str, path: str, body: bytes | None = None, headers: dict[str, str] | None = None
    ) -> tuple[int, dict[str, str], Any]:
        """One request on the same keep-alive connection as every other request of the test."""
        self.conn.request(method, path, body=body, headers=headers or {})
        r = self.conn.getresponse()
        raw = r.read()
        hdrs = {k.lower(): v for k, v in r.getheaders()}
        return (
            r.status,
            hdrs,
            (json.loads(raw) if hdrs.get("content-type", "").startswith("application/json") else raw),
        )

    def create_home(self, code: str) -> tuple[int, dict[str, str], Any]:
        return self.request("POST", "/api/v1/homes", json.dumps({"code": code}).encode(), self.staff_json)

    def heartbeat(self) -> tuple[int, dict[str, str], Any]:
        body = {"sent_at": dt.datetime.now(dt.UTC).isoformat(), "listening": True, "firmware": "1.2.0"}
        headers = {"Authorization": f"Bearer {self.device_token}", "Content-Type": "application/json"}
        return self.request("POST", "/api/v1/heartbeats", json.dumps(body).encode(), headers)

    def alert(self) -> tuple[int, dict[str, str], Any]:
        meta = {
            "event_id": os.urandom(8).hex(),
            "sound_class": "smoke_alarm",
            "score": 0.8,
            "detected_at": dt.datetime.now(dt.UTC).isoformat(),
            "clip_offset_s": 0.2,
            "firmware": "1.2.0",
        }

        def part(name: str, body: bytes) -> bytes:
            head = f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n'
            return head.encode() + body + b"\r\n"

        body = part("meta", json.dumps(meta).encode()) + part("clip", factories.sine_wav(seed=7))
        body += f"--{BOUNDARY}--\r\n".encode()
        return self.request(
            "POST",
            "/api/v1/alerts",
            body,
            {
                "Authorization": f"Bearer {self.device_token}",
                "Content-Type": f"multipart/form-data; boundary={BOUNDARY}",
            },
        )

    def health(self) -> tuple[int, dict[str, str], Any]:
        return self.request("GET", "/api/v1/health")


@pytest.fixture
def world(fresh_settings: Settings) -> Iterator[World]:
    open_db(fresh_settings)
    with committed_session(fresh_settings) as db:
        trial = trials_service.ensure_default_trial(
            db, fresh_settings.default_trial_code, fresh_settings.default_sound_classes
        )
        user, _ = factories.make_user(db, role="admin")
        _, staff_token = auth_service.create_api_token(db, user, "faults")
        _, device_token = factories.make_device(db, trial)
    with LiveServer(fresh_settings) as srv:
        w = World(srv, staff_token, device_token)
        try:
            yield w
        finally:
            w.conn.close()


def assert_storage_fault(result: tuple[int, dict[str, str], Any], code: str) -> None:
    status, headers, body = result
    assert status == 503, (status, body)
    assert body["error"]["code"] == code, body
    assert int(headers["retry-after"]) > 0


def on_every_connection(world: World, statements_sqlite: list[str], statements_pg: list[str]) -> None:
    """Run statements on each new connection of the server's engine, then start from new connections."""
    engine = world.srv.app.state.engine
    statements = statements_sqlite if engine.dialect.name == "sqlite" else statements_pg

    @event.listens_for(engine, "connect")
    def _fault(dbapi_conn: Any, _record: Any) -> None:
        cur = dbapi_conn.cursor()
        for sql in statements:
            cur.execute(sql)
        cur.close()
        if engine.dialect.name != "sqlite":
            dbapi_conn.commit()

    engine.dispose()


def test_read_only_database_is_503_and_the_connection_stays_usable(world: World) -> None:
    assert world.create_home("H-0101")[0] == 201
    on_every_connection(world, ["PRAGMA query_only=ON"], ["SET default_transaction_read_only = on"])
    assert_storage_fault(world.create_home("H-0102"), "database_read_only")
    assert_storage_fault(world.heartbeat(), "database_read_only")
    # The same connection answers the next request (a 500 used to reset it).
    status, _, body = world.request(
        "GET", "/api/v1/homes", headers={"Authorization": f"Bearer {world.staff_token}"}
    )
    assert status == 200 and [h["code"] for h in body] == ["H-0101"]
    status, headers, body = world.health()
    assert status == 503 and body["checks"]["database"] == "failed: database_read_only"
    assert body["error"]["code"] == "unhealthy" and int(headers["retry-after"]) > 0


def test_full_database_disk_is_503_storage_full(world: World) -> None:
    engine = world.srv.app.state.engine
    if engine.dialect.name == "sqlite":
        # SQLite's own page limit: a write past it fails exactly as on a full disk (SQLITE_FULL).
        with engine.connect() as conn:
            pages = conn.execute(text("PRAGMA page_count")).scalar_one()
        on_every_connection(world, [f"PRAGMA max_page_count={pages}"], [])
        big = {"code": "H-0201", "note": "n" * 2000}
    else:
        with engine.begin() as conn:
            conn.execute(
                text(
                    "CREATE FUNCTION fault_disk_full() RETURNS trigger LANGUAGE plpgsql AS "
                    "$$ BEGIN RAISE EXCEPTION 'could not extend file: No space left on device' "
                    "USING ERRCODE = '53100'; END $$"
                )
            )
            conn.execute(
                text(
                    "CREATE TRIGGER fault_disk_full BEFORE INSERT ON home "
                    "FOR EACH ROW EXECUTE FUNCTION fault_disk_full()"
                )
            )
        big = {"code": "H-0201"}
    # Free room left in the last pages takes a few rows; the first write past it must fail cleanly.
    for n in range(201, 400):
        big["code"] = f"H-{n:04d}"
        result = world.request("POST", "/api/v1/homes", json.dumps(big).encode(), world.staff_json)
        if result[0] != 201:
            break
    assert_storage_fault(result, "storage_full")
    assert (
        world.request(
            "GET", f"/api/v1/homes/{big['code']}", headers={"Authorization": f"Bearer {world.staff_token}"}
        )[0]
        == 404
    )


def test_disk_almost_full_fails_health(world: World, monkeypatch: pytest.MonkeyPatch) -> None:
    assert world.health()[0] == 200
    real = os.statvfs

    def nearly_full(path: Any) -> Any:
        st = real(path)
        return os.statvfs_result(
            (
                st.f_bsize,
                st.f_frsize,
                st.f_blocks,
                10,
                10,
                st.f_files,
                st.f_ffree,
                st.f_favail,
                st.f_flag,
                st.f_namemax,
            )
        )

    monkeypatch.setattr(os, "statvfs", nearly_full)
    status, headers, body = world.health()
    assert status == 503 and body["checks"]["disk_space"].startswith("failed: storage_full")
    assert body["checks"]["database"] == "ok" and int(headers["retry-after"]) > 0


def test_clip_store_full_is_503_storage_full(world: World, monkeypatch: pytest.MonkeyPatch) -> None:
    def no_space(self: ClipStore, *args: Any, **kw: Any) -> Any:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(ClipStore, "put_file", no_space)
    assert_storage_fault(world.alert(), "storage_full")
    assert world.heartbeat()[0] == 200  # the same connection, and the database still writes


def test_unwritable_clip_store_is_503_and_fails_health(world: World, monkeypatch: pytest.MonkeyPatch) -> None:
    def denied(self: ClipStore, *args: Any, **kw: Any) -> Any:
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(ClipStore, "spool", denied)
    monkeypatch.setattr(ClipStore, "writable", lambda self: False)
    assert_storage_fault(world.alert(), "clip_store_unavailable")
    status, _, body = world.health()
    assert status == 503 and body["checks"]["clip_store"] == "failed: clip_store_unavailable"
    assert world.heartbeat()[0] == 200


def test_health_write_probe_does_not_wait_for_a_busy_writer(world: World) -> None:
    engine = world.srv.app.state.engine
    with engine.connect() as conn:
        tx = conn.begin()
        conn.execute(text("UPDATE alembic_version SET version_num = version_num"))
        try:
            status, _, body = world.health()  # another connection holds the write lock meanwhile
        finally:
            tx.rollback()
    assert status == 200 and body["checks"]["database"] == "ok"
