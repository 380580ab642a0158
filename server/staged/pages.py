"""Staged-event pages: log a test sound on a home's page, delete one. Thin routes over
staged.service; a refused form shows the home's page again with the errors.
"""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from starlette.datastructures import FormData
from starlette.responses import Response

from server.auth.models import User
from server.deps import DbSession, require
from server.errors import AppError, ValidationFailed
from server.households import forms, home_pages
from server.households import service as households_service
from server.staged import service as staged_service

router = APIRouter(include_in_schema=False)


@router.post("/homes/{code}/staged-events")
def staged_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("staged.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    values = {k: forms.text(form, k) for k in ("sound_class", "started_at", "ended_at", "source", "level_db")}
    try:
        start = forms.local_dt(values["started_at"], t.timezone, "started_at")
        end = forms.local_dt(values["ended_at"], t.timezone, "ended_at")
        level = None
        if values["level_db"]:
            try:
                level = float(values["level_db"])
            except ValueError:
                raise ValidationFailed(
                    "A sound level is a number.", {"level_db": "A number, in dB."}
                ) from None
        staged_service.log_staged_event(
            session,
            home=home,
            sound_class=values["sound_class"],
            started_at=start,
            ended_at=end,
            source=values["source"],
            level_db=level,
            actor=user,
        )
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "households/detail.html",
            home_pages.home_ctx(
                session,
                request,
                home,
                staged_errors=exc.errors or {"source": exc.message},
                staged_values=values,
            ),
            status_code=422,
        )
    session.commit()
    forms.flash(request, f"Staged {values['sound_class'].replace('_', ' ')} test logged for {home.code}.")
    return forms.go(f"/homes/{home.code}#staged")


@router.post("/homes/{code}/staged-events/{event_id}/delete")
def staged_delete(
    code: str,
    event_id: int,
    request: Request,
    session: DbSession,
    user: User = Depends(require("staged.manage")),
) -> Response:
    home = households_service.get_home(session, code)
    ev = staged_service.get_staged_event(session, event_id)
    if ev.home_id != home.id:
        raise AppError(f"Staged event {event_id} is not in {home.code}.", code="not_found", status=404)
    staged_service.delete_staged_event(session, ev, actor=user)
    session.commit()
    forms.flash(request, "Staged event deleted.")
    return forms.go(f"/homes/{home.code}#staged")
