"""The weekly summary page (choose trial and ISO week; printable) and its HTML export."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import HTMLResponse
from starlette.responses import Response

from server.analytics import report
from server.analytics.api import WEEK_PATTERN, summary_for
from server.auth.models import User
from server.deps import DbSession, require
from server.trials import service as trials_service
from server.web.templating import render

router = APIRouter(include_in_schema=False)


def _trial_code(session: Any, trial: str | None) -> str:
    return trial or trials_service.trial_in_view(session, None).code


@router.get("/summary")
def summary_page(
    request: Request,
    session: DbSession,
    trial: str | None = Query(None),
    week: str | None = Query(None, pattern=r"^(\d{4}-W\d{2})?$"),
    user: User = Depends(require("summary.view")),
) -> Response:
    summary = summary_for(request, session, _trial_code(session, trial), week or None)
    ctx = report.context(summary, links=True)
    ctx["trials"] = trials_service.list_trials(session)
    return render(request, "analytics/summary.html", ctx)


@router.get("/summary/export")
def summary_export(
    request: Request,
    session: DbSession,
    trial: str | None = Query(None),
    week: str | None = Query(None, pattern=WEEK_PATTERN),
    user: User = Depends(require("summary.view")),
) -> Response:
    summary = summary_for(request, session, _trial_code(session, trial), week)
    filename = f"{summary.trial_code}-{summary.week.label}-summary.html"
    return HTMLResponse(
        report.standalone_html(summary), headers={"Content-Disposition": f'attachment; filename="{filename}"'}
    )
