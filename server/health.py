"""GET /api/v1/health: is the database reachable and at head, and is the clip store writable?"""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from sqlalchemy import text

from server import migrate

router = APIRouter()


@router.get("/api/v1/health", tags=["device"], summary="Liveness of the database and the clip store")
def health(request: Request) -> JSONResponse:
    state = request.app.state
    checks: dict[str, str] = {}
    try:
        with state.engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        checks["database"] = "ok"
    except Exception as exc:  # any driver error means unusable
        checks["database"] = f"failed: {type(exc).__name__}"
    checks["clip_store"] = "ok" if state.clip_store.writable() else "failed: not writable"
    failing = [k for k, v in checks.items() if v != "ok"]
    if failing:
        return JSONResponse({"error": {"code": "unhealthy",
                                       "message": f"Unusable: {', '.join(failing)}.", "checks": checks},
                             "status": "unhealthy", "checks": checks}, status_code=503)
    return JSONResponse({"status": "ok", "checks": checks, "schema": state.schema_revision})
