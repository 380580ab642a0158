"""GET /api/v1/health: does the database take writes, is the clip store writable, is there disk space?"""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from sqlalchemy import text
from sqlalchemy.engine import Engine

from server.db import SQLITE_BUSY_TIMEOUT_S
from server.errors import StorageFault, error_body, storage_fault

router = APIRouter()

MIB = 1024 * 1024


def database_check(engine: Engine) -> str:
    """ "ok", or why the database cannot store anything.

    A cheap write probe: a no-op UPDATE of Alembic's version row, rolled back. A read (SELECT 1)
    passes on a read-only or full database; a write attempt does not. The probe never waits for
    the write lock: when another connection holds it, writes are going through, which is the answer.
    """
    try:
        if engine.dialect.name == "sqlite":
            _probe_sqlite(engine)
        else:
            with engine.connect() as conn, conn.begin() as tx:
                conn.execute(text("SET LOCAL lock_timeout = '1s'"))
                try:
                    conn.execute(text("UPDATE alembic_version SET version_num = version_num"))
                except Exception as exc:
                    if getattr(getattr(exc, "orig", None), "sqlstate", None) != "55P03":  # lock_not_available
                        raise
                tx.rollback()
        return "ok"
    except Exception as exc:  # any driver error means unusable
        fault = storage_fault(exc)
        return f"failed: {fault.code}" if fault else f"failed: {type(exc).__name__}"


def _probe_sqlite(engine: Engine) -> None:
    raw = engine.raw_connection()
    try:
        cur = raw.driver_connection.cursor()  # type: ignore[union-attr]
        cur.execute("PRAGMA busy_timeout=0")
        try:
            try:
                cur.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as exc:
                if getattr(exc, "sqlite_errorcode", 0) & 0xFF in (5, 6):  # SQLITE_BUSY / _LOCKED
                    return
                raise
            try:
                cur.execute("UPDATE alembic_version SET version_num = version_num")
            finally:
                cur.execute("ROLLBACK")
        finally:
            cur.execute(f"PRAGMA busy_timeout={int(SQLITE_BUSY_TIMEOUT_S * 1000)}")
            cur.close()
    finally:
        raw.close()


def free_space_check(path: Path, min_free_bytes: int) -> str:
    try:
        st = os.statvfs(path)
    except OSError as exc:
        return f"failed: cannot read free space ({exc.strerror})"
    free = st.f_bavail * st.f_frsize
    if free < min_free_bytes:
        return f"failed: storage_full ({free // MIB} MiB free, at least {min_free_bytes // MIB} MiB needed)"
    return "ok"


@router.get(
    "/api/v1/health",
    tags=["device"],
    summary="Can the server store heartbeats and clips now?",
    responses={503: {"description": "A check failed (`unhealthy`); the body names each check"}},
)
def health(request: Request) -> JSONResponse:
    state = request.app.state
    settings = state.settings
    checks: dict[str, str] = {
        "database": database_check(state.engine),
        "clip_store": "ok" if state.clip_store.writable() else "failed: clip_store_unavailable",
        "disk_space": free_space_check(settings.data_dir, settings.min_free_bytes),
    }
    failing = [k for k, v in checks.items() if v != "ok"]
    if failing:
        body = error_body("unhealthy", f"Unusable: {', '.join(failing)}.", checks=checks)
        body.update({"status": "unhealthy", "checks": checks})
        return JSONResponse(body, status_code=503, headers={"Retry-After": str(StorageFault.RETRY_AFTER_S)})
    return JSONResponse({"status": "ok", "checks": checks, "schema": state.schema_revision})
