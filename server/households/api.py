"""Register API v1: homes, lifecycle, consent, contact (personal data), attributes, import/export
and erasure. Thin routes over households.service; installations are in installation_api.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy.orm import Session

from server.auth.models import User
from server.db import begin_write
from server.deps import ClipStoreDep, DbSession, SettingsDep, require
from server.errors import AppError, InvalidRequest, error_body
from server.households import catalogue, erasure, schemas, service, transfer, views
from server.households.models import Home
from server.roles import allowed
from server.trials import service as trials_service
from server.trials.models import Trial

router = APIRouter(prefix="/api/v1", tags=["register"])


def _now(request: Request):  # type: ignore[no-untyped-def]
    return request.app.state.clock()


def _trial(session: Session, code: str | None) -> Trial:
    return trials_service.trial_in_view(session, code)


def home_out(session: Session, home: Home) -> schemas.HomeOut:
    row = views.register_rows(session, [home])[0]
    trial = service.trial_of(session, home)
    return schemas.HomeOut(
        code=row.code,
        trial=trial.code,
        state=row.state,
        state_changed_at=row.state_changed_at,
        attributes=row.attributes,
        devices_installed=row.devices,
        consented=row.consented,
        erased=row.erased,
    )


@router.get("/homes", response_model=list[schemas.HomeOut])
def api_list_homes(
    session: DbSession,
    trial: str | None = None,
    state: str | None = None,
    attribute: str | None = None,
    value: str | None = None,
    sort: str = "code",
    descending: bool = False,
    user: User = Depends(require("homes.view")),
) -> list[schemas.HomeOut]:
    t = _trial(session, trial)
    parsed: Any = None
    if attribute:
        spec = next((d for d in catalogue.list_catalogue(session, t) if d.key == attribute), None)
        if spec is None:
            raise InvalidRequest(f"'{attribute}' is not an attribute of trial {t.code}.", field="attribute")
        try:
            parsed = catalogue.parse_value(spec, value)
        except ValueError as exc:
            raise InvalidRequest(str(exc), field="value") from None
    homes = service.list_homes(
        session, t, state=state, attribute=attribute, value=parsed, sort=sort, descending=descending
    )
    rows = views.register_rows(session, homes)
    return [
        schemas.HomeOut(
            code=r.code,
            trial=t.code,
            state=r.state,
            state_changed_at=r.state_changed_at,
            attributes=r.attributes,
            devices_installed=r.devices,
            consented=r.consented,
            erased=r.erased,
        )
        for r in rows
    ]


@router.post("/homes", response_model=schemas.HomeOut, status_code=201)
def api_create_home(
    body: schemas.HomeIn, request: Request, session: DbSession, user: User = Depends(require("homes.manage"))
) -> schemas.HomeOut:
    home = service.create_home(
        session,
        _trial(session, body.trial),
        attributes=body.attributes,
        code=body.code,
        actor=user,
        note=body.note,
        at=body.at or _now(request),
    )
    session.commit()
    return home_out(session, home)


@router.get(
    "/homes/export.csv", response_class=Response, summary="The register as CSV, without personal data"
)
def api_export(
    session: DbSession, trial: str | None = None, user: User = Depends(require("homes.view"))
) -> Response:
    t = _trial(session, trial)
    text = transfer.export_csv(session, t, with_personal_data=False, actor=user)
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="register-{t.code}.csv"'},
    )


@router.get(
    "/homes/export-personal.csv",
    response_class=Response,
    summary="The register as CSV with contact details (audited)",
)
def api_export_personal(
    session: DbSession, trial: str | None = None, user: User = Depends(require("personal.view"))
) -> Response:
    begin_write(session)  # the view writes an audit row
    t = _trial(session, trial)
    text = transfer.export_csv(session, t, with_personal_data=True, actor=user)
    session.commit()
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={
            "Content-Disposition": f'attachment; filename="register-{t.code}-personal.csv"',
            "Cache-Control": "no-store",
        },
    )


async def _csv_body(request: Request) -> bytes:
    if request.headers.get("content-type", "").startswith(
        ("application/x-www-form-urlencoded", "multipart/")
    ):
        raise AppError(
            "Send the CSV file itself as the body (Content-Type: text/csv), not a form.",
            code="unsupported_media_type",
            status=415,
        )
    body = bytearray()
    async for chunk in request.stream():
        body.extend(chunk)
        if len(body) > transfer.MAX_IMPORT_BYTES:
            raise InvalidRequest(f"The file is larger than {transfer.MAX_IMPORT_BYTES // (1024 * 1024)} MiB.")
    return bytes(body)


def import_rejected_response(exc: transfer.ImportRejected) -> JSONResponse:
    problems = [
        schemas.ImportProblemOut(row=p.row, code=p.code, column=p.column, problem=p.problem).model_dump()
        for p in exc.report.problems
    ]
    return JSONResponse(
        error_body(exc.code, exc.message, problems=problems, rows=exc.report.rows), status_code=exc.status
    )


@router.post(
    "/homes/import",
    response_model=schemas.ImportOut,
    status_code=201,
    summary="Import homes from a CSV body (all rows or none)",
    responses={422: {"description": "import_rejected, with 'problems' per row"}},
)
def api_import(
    session: DbSession,
    trial: str | None = None,
    data: bytes = Depends(_csv_body),
    user: User = Depends(require("homes.manage")),
) -> Any:
    t = _trial(session, trial)
    try:
        report = transfer.import_csv(session, t, data, actor=user)
    except transfer.ImportRejected as exc:
        return import_rejected_response(exc)  # nothing was written
    session.commit()
    return JSONResponse(
        schemas.ImportOut(rows=report.rows, created=list(report.created)).model_dump(), status_code=201
    )


@router.get("/homes/{code}", response_model=schemas.HomeOut)
def api_get_home(
    code: str, session: DbSession, user: User = Depends(require("homes.view"))
) -> schemas.HomeOut:
    return home_out(session, service.get_home(session, code))


@router.patch("/homes/{code}", response_model=schemas.HomeOut)
def api_patch_home(
    code: str, body: schemas.HomePatch, session: DbSession, user: User = Depends(require("homes.manage"))
) -> schemas.HomeOut:
    home = service.update_attributes(
        session, service.get_home(session, code), body.attributes, actor=user, merge=True
    )
    session.commit()
    return home_out(session, home)


@router.get("/homes/{code}/timeline", response_model=list[schemas.TimelineOut])
def api_timeline(
    code: str, session: DbSession, user: User = Depends(require("homes.view"))
) -> list[schemas.TimelineOut]:
    home = service.get_home(session, code)
    # Free-text notes are for the people who run the register.
    notes = allowed(user.role, "personal.view")
    return [
        schemas.TimelineOut(
            at=c.at,
            from_state=c.from_state,
            to_state=c.to_state,
            author=u.name if u else "system",
            note=c.note if notes else None,
            listening=c.listening,
        )
        for c, u in service.timeline_of(session, home)
    ]


@router.post("/homes/{code}/transitions", response_model=schemas.TransitionOut)
def api_transition(
    code: str,
    body: schemas.TransitionIn,
    request: Request,
    session: DbSession,
    user: User = Depends(require("homes.manage")),
) -> schemas.TransitionOut:
    home = service.get_home(session, code)
    result = service.transition(
        session,
        home,
        body.to_state,
        actor=user,
        at=body.at or _now(request),
        note=body.note,
        listening=body.listening,
    )
    session.commit()
    return schemas.TransitionOut(
        home=home_out(session, home),
        warnings=list(result.warnings),
        closed_installations=[i.id for i in result.closed],
    )


@router.get("/homes/{code}/consents", response_model=list[schemas.ConsentOut])
def api_consents(
    code: str, session: DbSession, user: User = Depends(require("homes.view"))
) -> list[schemas.ConsentOut]:
    ov = views.home_overview(session, service.get_home(session, code))
    return [
        schemas.ConsentOut(
            form_version=c.form_version,
            consented_on=c.consented_on,
            staff_may_listen=c.staff_may_listen,
            retention_days=c.retention_days,
            recorded_at=c.recorded_at,
        )
        for c in ov.consents
    ]


@router.post("/homes/{code}/consents", response_model=schemas.ConsentOut, status_code=201)
def api_record_consent(
    code: str,
    body: schemas.ConsentIn,
    request: Request,
    session: DbSession,
    user: User = Depends(require("homes.manage")),
) -> schemas.ConsentOut:
    home = service.get_home(session, code)
    c = service.record_consent(
        session,
        home,
        form_version=body.form_version,
        consented_on=body.consented_on,
        staff_may_listen=body.staff_may_listen,
        retention_days=body.retention_days,
        actor=user,
        mark_consented=body.mark_consented,
        at=body.at,
        today=_now(request).date(),
    )
    session.commit()
    return schemas.ConsentOut(
        form_version=c.form_version,
        consented_on=c.consented_on,
        staff_may_listen=c.staff_may_listen,
        retention_days=c.retention_days,
        recorded_at=c.recorded_at,
    )


# --- personal data ------------------------------------------------------------------------------


def _contact_out(home: Home, contact: Any) -> schemas.ContactOut:
    if contact is None:
        return schemas.ContactOut(code=home.code)
    return schemas.ContactOut(
        code=home.code,
        names=contact.names,
        address=contact.address,
        phone=contact.phone,
        email=contact.email,
        access_notes=contact.access_notes,
        updated_at=contact.updated_at,
    )


@router.get(
    "/homes/{code}/contact",
    response_model=schemas.ContactOut,
    summary="The household's contact details (personal data; the view is audited)",
)
def api_get_contact(
    code: str, session: DbSession, user: User = Depends(require("personal.view"))
) -> JSONResponse:
    begin_write(session)  # the view writes an audit row
    home = service.get_home(session, code)
    contact = service.view_contact(session, home, actor=user, via="api")
    session.commit()
    return JSONResponse(
        _contact_out(home, contact).model_dump(mode="json"), headers={"Cache-Control": "no-store"}
    )


@router.put("/homes/{code}/contact", response_model=schemas.ContactOut)
def api_put_contact(
    code: str, body: schemas.ContactIn, session: DbSession, user: User = Depends(require("personal.manage"))
) -> JSONResponse:
    home = service.get_home(session, code)
    contact = service.set_contact(session, home, actor=user, **body.model_dump())
    session.commit()
    return JSONResponse(
        _contact_out(home, contact).model_dump(mode="json"), headers={"Cache-Control": "no-store"}
    )


# --- erasure ------------------------------------------------------------------------------------


@router.get(
    "/homes/{code}/erasure",
    response_model=schemas.ErasurePlanOut,
    summary="Step 1 of withdrawal with erasure: what will be erased and kept, and a ticket",
)
def api_erasure_plan(
    code: str,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    user: User = Depends(require("homes.erase")),
) -> schemas.ErasurePlanOut:
    home = service.get_home(session, code)
    plan = erasure.plan_erasure(session, home)
    ticket = erasure.erasure_ticket(settings.resolved_secret_key(), home, now=_now(request))
    return schemas.ErasurePlanOut(
        code=home.code,
        will_erase=list(plan.will_erase),
        will_keep=list(plan.will_keep),
        clips_to_delete=plan.clips_to_delete,
        alerts_kept=plan.alerts_kept,
        ticket=ticket,
        expires_in_s=int(erasure.TICKET_TTL.total_seconds()),
    )


@router.post(
    "/homes/{code}/erasure",
    response_model=schemas.ErasureOut,
    summary="Step 2: erase, with the ticket and the home code typed again (irreversible)",
)
def api_erase(
    code: str,
    body: schemas.ErasureIn,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    store: ClipStoreDep,
    user: User = Depends(require("homes.erase")),
) -> schemas.ErasureOut:
    home = service.get_home(session, code)
    r = erasure.erase_home(
        session,
        store,
        home,
        secret=settings.resolved_secret_key(),
        ticket=body.ticket,
        confirm_code=body.confirm_code,
        actor=user,
        now=_now(request),
        cache_dir=settings.cache_dir,
        note=body.note,
    )
    session.commit()
    return schemas.ErasureOut(
        code=r.code,
        complete=r.complete,
        contact_erased=r.contact_erased,
        clips_deleted=r.clips_deleted,
        clips_shared_kept=r.clips_shared,
        alerts_kept=r.alerts_kept,
    )


# --- the attribute catalogue --------------------------------------------------------------------


def _attr_out(d: Any) -> schemas.AttributeOut:
    return schemas.AttributeOut(
        key=d.key,
        label=d.label,
        kind=d.kind,
        options=list(d.options or []),
        min_value=d.min_value,
        max_value=d.max_value,
    )


@router.get("/attributes", response_model=list[schemas.AttributeOut])
def api_attributes(
    session: DbSession, trial: str | None = None, user: User = Depends(require("homes.view"))
) -> list[schemas.AttributeOut]:
    return [_attr_out(d) for d in catalogue.list_catalogue(session, _trial(session, trial))]


@router.post("/attributes", response_model=schemas.AttributeOut, status_code=201)
def api_add_attribute(
    body: schemas.AttributeIn, session: DbSession, user: User = Depends(require("attributes.manage"))
) -> schemas.AttributeOut:
    d = catalogue.add_attribute(
        session,
        _trial(session, body.trial),
        key=body.key,
        label=body.label,
        kind=body.kind,
        options=body.options,
        min_value=body.min_value,
        max_value=body.max_value,
        actor=user,
    )
    session.commit()
    return _attr_out(d)
