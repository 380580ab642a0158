"""Staff JSON API of the weekly summary, and CSV downloads of each of its tables."""

from __future__ import annotations

import re
from typing import Any

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response

from server.analytics import weekly
from server.auth.models import User
from server.deps import DbSession, require
from server.errors import NotFound
from server.web.csvsafe import safe_frame

router = APIRouter(prefix="/api/v1", tags=["analytics"])

WEEK_PATTERN = r"^\d{4}-W\d{2}$"
_TABLE_NAME = re.compile(r"^[a-z0-9_-]{1,120}$")


def summary_for(request: Request, session: Any, code: str, week: str | None) -> weekly.WeeklySummary:
    """The summary for a trial and week at the app's clock (shared by the API and the pages)."""
    return weekly.build_summary(session, trial_code=code, week=week, now=request.app.state.clock())


@router.get("/trials/{code}/summary", summary="The weekly summary's figures (default: last complete week)")
def api_summary(
    code: str,
    request: Request,
    session: DbSession,
    week: str | None = Query(None, pattern=WEEK_PATTERN, description="ISO week, e.g. 2026-W48"),
    user: User = Depends(require("summary.view")),
) -> dict[str, Any]:
    return weekly.summary_json(summary_for(request, session, code, week))


@router.get(
    "/trials/{code}/summary/tables", summary="Names of the summary's tables (each downloadable as CSV)"
)
def api_tables(
    code: str,
    request: Request,
    session: DbSession,
    week: str | None = Query(None, pattern=WEEK_PATTERN),
    user: User = Depends(require("summary.view")),
) -> dict[str, list[str]]:
    return {"tables": sorted(weekly.summary_tables(summary_for(request, session, code, week)))}


@router.get("/trials/{code}/summary/tables/{name}.csv", summary="One table of the weekly summary as CSV")
def api_table_csv(
    code: str,
    name: str,
    request: Request,
    session: DbSession,
    week: str | None = Query(None, pattern=WEEK_PATTERN),
    user: User = Depends(require("summary.view")),
) -> Response:
    if not _TABLE_NAME.match(name):
        raise NotFound(f"The summary has no table called {name!r}.", code="unknown_table")
    summary = summary_for(request, session, code, week)
    tables = weekly.summary_tables(summary)
    if name not in tables:
        raise NotFound(f"The summary has no table called {name!r}.", code="unknown_table")
    # Firmware strings come from devices and attribute values from coordinators: escape text cells.
    # CRLF line ends (RFC 4180) make the writer quote any cell holding a CR, which would split a row.
    body = safe_frame(tables[name]).to_csv(index=False, lineterminator="\r\n")
    filename = f"{summary.trial_code}-{summary.week.label}-{name}.csv"
    return Response(
        body,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{filename}"'},
    )
