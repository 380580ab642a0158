"""Register pages: the home list, a home, its forms, contact details, installations, erasure,
import/export, the attribute catalogue and the quota. Thin routes over households.service.
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import RedirectResponse
from sqlalchemy import select
from sqlalchemy.orm import Session
from starlette.datastructures import FormData, UploadFile
from starlette.responses import Response

from server.auth.models import User
from server.db import begin_write
from server.deps import ClipStoreDep, DbSession, SettingsDep, require
from server.devices import service as devices_service
from server.devices.models import Device
from server.errors import AppError, ValidationFailed
from server.households import catalogue, erasure, lifecycle, service, transfer, views
from server.households.models import Home, HomeState
from server.installations import service as installations_service
from server.installations.models import ROOMS
from server.roles import allowed
from server.trials import service as trials_service
from server.trials.models import Trial
from server.web.templating import render

router = APIRouter(include_in_schema=False)

CAPS = (
    "homes.manage",
    "personal.view",
    "personal.manage",
    "homes.erase",
    "installations.manage",
    "staged.manage",
    "quota.manage",
    "attributes.manage",
    "devices.view",
)
INPUT_FMT = "%Y-%m-%dT%H:%M"


# --- helpers ------------------------------------------------------------------------------------


async def form_data(request: Request) -> FormData:
    return await request.form()


def _s(form: FormData, name: str) -> str:
    v = form.get(name)
    return v.strip() if isinstance(v, str) else ""


def flash(request: Request, message: str, kind: str = "ok") -> None:
    items = list(request.session.get("flash", []))
    items.append([kind, message])
    request.session["flash"] = items[-6:]


def _page(request: Request, user: User, name: str, ctx: dict[str, Any], status_code: int = 200) -> Response:
    base = {
        "can": {c: allowed(user.role, c) for c in CAPS},
        "flashes": request.session.pop("flash", []),
        "rooms": ROOMS,
        "states": HomeState.all,
        "input_fmt": INPUT_FMT,
    }
    base.update(ctx)
    return render(request, name, base, status_code=status_code)


def _go(url: str) -> Response:
    return RedirectResponse(url, status_code=303)


def _now(request: Request) -> dt.datetime:
    return request.app.state.clock()  # type: ignore[no-any-return]


def _local_dt_or_none(value: str, tz: str, field: str) -> dt.datetime | None:
    """A datetime-local form value, read in the trial's time zone, as aware UTC (None when blank)."""
    value = (value or "").strip()
    if not value:
        return None
    try:
        naive = dt.datetime.fromisoformat(value)
    except ValueError:
        raise ValidationFailed(
            f"'{value}' is not a date and time.", {field: "Use YYYY-MM-DD HH:MM."}
        ) from None
    if naive.tzinfo is not None:
        return naive.astimezone(dt.UTC)
    return naive.replace(tzinfo=zoneinfo.ZoneInfo(tz)).astimezone(dt.UTC)


def _local_dt(value: str, tz: str, field: str) -> dt.datetime:
    at = _local_dt_or_none(value, tz, field)
    if at is None:
        raise ValidationFailed("Give a date and time.", {field: "Give a date and time."})
    return at


def _int(value: str, field: str) -> int | None:
    value = (value or "").strip()
    if not value:
        return None
    try:
        return int(value)
    except ValueError:
        raise ValidationFailed(f"'{value}' is not a whole number.", {field: "A whole number."}) from None


def _trials(session: Session) -> list[Trial]:
    return trials_service.list_trials(session)


def _home_and_trial(session: Session, code: str) -> tuple[Home, Trial]:
    home = service.get_home(session, code)
    return home, service.trial_of(session, home)


def _traits(row_attrs: dict[str, Any], specs: list[Any]) -> list[str]:
    """A short reading of a home's answers: yes attributes by label, options and numbers with labels."""
    out = []
    for s in specs:
        v = row_attrs.get(s.key)
        if v is True:
            out.append(s.label.lower() if s.label[:1].isupper() and not s.label[1:2].isupper() else s.label)
        elif s.kind == "one_of" and v:
            out.append(str(v))
        elif s.kind == "whole_number" and v is not None:
            out.append(f"{s.label.lower()}: {v}")
    return out


# --- register list ------------------------------------------------------------------------------


@router.get("/homes")
def register_page(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    state: str | None = None,
    attribute: str | None = None,
    value: str | None = None,
    sort: str = "code",
    desc: bool = False,
    user: User = Depends(require("homes.view")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    specs = catalogue.list_catalogue(session, t)
    error = None
    parsed = None
    spec = next((s for s in specs if s.key == attribute), None) if attribute else None
    if attribute and spec is None:
        error, attribute = f"'{attribute}' is not an attribute of this trial.", None
    elif spec is not None:
        try:
            parsed = catalogue.parse_value(spec, value)
        except ValueError as exc:
            error, attribute = str(exc), None
    if state and state not in HomeState.all:
        error, state = f"'{state}' is not a home state.", None
    if sort not in service.SORTS:
        sort = "code"
    homes = service.list_homes(
        session, t, state=state or None, attribute=attribute, value=parsed, sort=sort, descending=desc
    )
    rows = views.register_rows(session, homes)
    return _page(
        request,
        user,
        "households/list.html",
        {
            "trial": t,
            "trials": _trials(session),
            "rows": rows,
            "counts": service.state_counts(session, t),
            "total": service.home_count(session, t),
            "specs": specs,
            "traits": {r.code: _traits(r.attributes, specs) for r in rows},
            "filters": {
                "state": state or "",
                "attribute": attribute or "",
                "value": value or "",
                "sort": sort,
                "desc": desc,
            },
            "sorts": service.SORTS,
            "error": error,
        },
    )


# --- new home -----------------------------------------------------------------------------------


def _attribute_values(form: FormData, specs: list[Any]) -> dict[str, str]:
    return {s.key: _s(form, f"attr_{s.key}") for s in specs}


@router.get("/homes/new")
def new_home_form(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _page(
        request,
        user,
        "households/new.html",
        {
            "trial": t,
            "trials": _trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "values": {},
            "contact": {},
            "errors": {},
            "note": "",
        },
    )


@router.post("/homes/new")
def new_home_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, _s(form, "trial") or None)
    specs = catalogue.list_catalogue(session, t)
    values = _attribute_values(form, specs)
    contact = {f: _s(form, f) for f in service.CONTACT_FIELDS}
    note = _s(form, "note")
    errors: dict[str, str] = {}
    # Check both parts first, so every message shows at once beside its field.
    _, attr_errors = catalogue.validate_attributes(specs, values)
    errors.update(attr_errors)
    if any(contact.values()):
        if not allowed(user.role, "personal.manage"):
            errors["names"] = "Your role may not record contact details."
        else:
            try:
                service.check_contact(contact)
            except ValidationFailed as exc:
                errors.update(exc.errors)
    if not errors:
        try:
            home = service.create_home(session, t, attributes=values, actor=user, note=note, at=_now(request))
            if any(contact.values()):
                service.set_contact(session, home, actor=user, **contact)
        except ValidationFailed as exc:
            errors.update(exc.errors or {"note": exc.message})
    if errors:
        return _page(
            request,
            user,
            "households/new.html",
            {
                "trial": t,
                "trials": _trials(session),
                "specs": specs,
                "values": values,
                "contact": contact,
                "errors": errors,
                "note": note,
            },
            status_code=422,
        )
    session.commit()
    flash(request, f"{home.code} added to the register as a candidate.")
    return _go(f"/homes/{home.code}")


# --- import / export ----------------------------------------------------------------------------


@router.get("/homes/import")
def import_form(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _page(
        request,
        user,
        "households/import.html",
        {
            "trial": t,
            "trials": _trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "report": None,
            "rejected": None,
            "contact_fields": service.CONTACT_FIELDS,
        },
    )


@router.post("/homes/import")
async def import_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    upload = form.get("file")
    data = await upload.read(transfer.MAX_IMPORT_BYTES + 1) if isinstance(upload, UploadFile) else b""
    trial_code = _s(form, "trial") or None

    def work() -> Response:
        t = trials_service.trial_in_view(session, trial_code)
        ctx = {
            "trial": t,
            "trials": _trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "report": None,
            "rejected": None,
            "contact_fields": service.CONTACT_FIELDS,
        }
        try:
            report = transfer.import_csv(session, t, data, actor=user)
        except transfer.ImportRejected as exc:
            ctx["rejected"] = exc
            return _page(request, user, "households/import.html", ctx, status_code=422)
        session.commit()
        ctx["report"] = report
        return _page(request, user, "households/import.html", ctx)

    from starlette.concurrency import run_in_threadpool

    return await run_in_threadpool(work)


def _csv_response(text: str, filename: str) -> Response:
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{filename}"', "Cache-Control": "no-store"},
    )


@router.get("/homes/export.csv")
def export_page(
    session: DbSession, trial: str | None = None, user: User = Depends(require("homes.view"))
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _csv_response(transfer.export_csv(session, t, actor=user), f"register-{t.code}.csv")


@router.get("/homes/export-personal.csv")
def export_personal_page(
    session: DbSession, trial: str | None = None, user: User = Depends(require("personal.view"))
) -> Response:
    begin_write(session)  # the view writes an audit row
    t = trials_service.trial_in_view(session, trial)
    text = transfer.export_csv(session, t, with_personal_data=True, actor=user)
    session.commit()
    return _csv_response(text, f"register-{t.code}-personal.csv")


# --- the attribute catalogue --------------------------------------------------------------------


@router.get("/homes/attributes")
def attributes_page(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("homes.view")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _page(
        request,
        user,
        "households/attributes.html",
        {
            "trial": t,
            "trials": _trials(session),
            "specs": catalogue.list_catalogue(session, t),
            "errors": {},
            "values": {},
            "kinds": catalogue.KIND_LABELS,
        },
    )


@router.post("/homes/attributes")
def attributes_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("attributes.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, _s(form, "trial") or None)
    values = {k: _s(form, k) for k in ("key", "label", "kind", "options", "min_value", "max_value")}
    try:
        catalogue.add_attribute(
            session,
            t,
            key=values["key"],
            label=values["label"],
            kind=values["kind"],
            options=values["options"].split(","),
            min_value=_int(values["min_value"], "min_value"),
            max_value=_int(values["max_value"], "max_value"),
            actor=user,
        )
    except (ValidationFailed, AppError) as exc:
        errors = exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"key": exc.message}
        return _page(
            request,
            user,
            "households/attributes.html",
            {
                "trial": t,
                "trials": _trials(session),
                "specs": catalogue.list_catalogue(session, t),
                "errors": errors,
                "values": values,
                "kinds": catalogue.KIND_LABELS,
            },
            status_code=422,
        )
    session.commit()
    flash(request, f"Attribute '{values['label']}' added to trial {t.code}.")
    return _go(f"/homes/attributes?trial={t.code}")


# --- one home -----------------------------------------------------------------------------------


def _home_ctx(session: Session, request: Request, home: Home, **extra: Any) -> dict[str, Any]:
    ov = views.home_overview(session, home, now=_now(request))
    ctx: dict[str, Any] = {
        "ov": ov,
        "home": home,
        "trial": ov.trial,
        "errors": {},
        "values": {},
        "now_local": _now(request),
        "staged_values": {},
        "state_errors": {},
        "consent_errors": {},
        "staged_errors": {},
    }
    ctx.update(extra)
    return ctx


@router.get("/homes/{code}")
def home_page(
    code: str, request: Request, session: DbSession, user: User = Depends(require("homes.view"))
) -> Response:
    home = service.get_home(session, code)
    return _page(request, user, "households/detail.html", _home_ctx(session, request, home))


@router.get("/homes/{code}/edit")
def edit_home_form(
    code: str, request: Request, session: DbSession, user: User = Depends(require("homes.manage"))
) -> Response:
    home, t = _home_and_trial(session, code)
    values = {k: catalogue.format_value(v) for k, v in (home.attributes or {}).items()}
    return _page(
        request,
        user,
        "households/edit.html",
        {
            "home": home,
            "trial": t,
            "values": values,
            "specs": catalogue.list_catalogue(session, t),
            "errors": {},
        },
    )


@router.post("/homes/{code}/edit")
def edit_home_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    specs = catalogue.list_catalogue(session, t)
    values = _attribute_values(form, specs)
    try:
        service.update_attributes(session, home, values, actor=user)
    except ValidationFailed as exc:
        return _page(
            request,
            user,
            "households/edit.html",
            {"home": home, "trial": t, "values": values, "specs": specs, "errors": exc.errors},
            status_code=422,
        )
    session.commit()
    flash(request, f"Attributes of {home.code} saved.")
    return _go(f"/homes/{home.code}")


@router.post("/homes/{code}/state")
def state_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    try:
        at = _local_dt_or_none(_s(form, "at"), t.timezone, "at") or _now(request)
        result = service.transition(
            session,
            home,
            _s(form, "to_state"),
            actor=user,
            at=at,
            note=_s(form, "note"),
            listening=_s(form, "listening") != "no",
        )
    except ValidationFailed as exc:
        return _page(
            request,
            user,
            "households/detail.html",
            _home_ctx(session, request, home, state_errors=exc.errors or {"to_state": exc.message}),
            status_code=422,
        )
    except AppError as exc:
        return _page(
            request,
            user,
            "households/detail.html",
            _home_ctx(session, request, home, state_errors={"to_state": exc.message}),
            status_code=exc.status,
        )
    session.commit()
    flash(request, f"{home.code} is now {home.state}.")
    for inst in result.closed:
        flash(request, f"The installation in the {inst.room.replace('_', ' ')} was closed.")
    for w in result.warnings:
        flash(request, w, "warn")
    return _go(f"/homes/{home.code}")


@router.post("/homes/{code}/consent")
def consent_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    try:
        raw_day = _s(form, "consented_on")
        try:
            day = dt.date.fromisoformat(raw_day)
        except ValueError:
            raise ValidationFailed(
                "Give the date the form was signed.", {"consented_on": "Give the date the form was signed."}
            ) from None
        retention = _int(_s(form, "retention_days"), "retention_days")
        service.record_consent(
            session,
            home,
            form_version=_s(form, "form_version"),
            consented_on=day,
            staff_may_listen=_s(form, "staff_may_listen") == "yes",
            retention_days=retention if retention is not None else 0,
            actor=user,
            mark_consented=_s(form, "mark_consented") == "yes",
            today=_now(request).date(),
        )
    except ValidationFailed as exc:
        return _page(
            request,
            user,
            "households/detail.html",
            _home_ctx(
                session,
                request,
                home,
                consent_errors=exc.errors or {"form_version": exc.message},
                consent_values=dict(form),
            ),
            status_code=422,
        )
    except AppError as exc:
        return _page(
            request,
            user,
            "households/detail.html",
            _home_ctx(
                session,
                request,
                home,
                consent_errors={"form_version": exc.message},
                consent_values=dict(form),
            ),
            status_code=exc.status,
        )
    session.commit()
    flash(
        request,
        f"Consent recorded for {home.code}"
        + (f"; it is now {home.state}." if home.state == HomeState.consented else "."),
    )
    return _go(f"/homes/{home.code}")


# --- personal data ------------------------------------------------------------------------------


@router.get("/homes/{code}/contact")
def contact_page(
    code: str, request: Request, session: DbSession, user: User = Depends(require("personal.view"))
) -> Response:
    begin_write(session)  # the view writes an audit row
    home, t = _home_and_trial(session, code)
    contact = service.view_contact(session, home, actor=user, via="page")
    session.commit()
    values = {f: getattr(contact, f) if contact else "" for f in service.CONTACT_FIELDS}
    resp = _page(
        request,
        user,
        "households/contact.html",
        {"home": home, "trial": t, "values": values, "contact": contact, "errors": {}},
    )
    resp.headers["Cache-Control"] = "no-store"
    return resp


@router.post("/homes/{code}/contact")
def contact_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("personal.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    values = {f: _s(form, f) for f in service.CONTACT_FIELDS}
    try:
        service.set_contact(session, home, actor=user, **values)
    except ValidationFailed as exc:
        resp = _page(
            request,
            user,
            "households/contact.html",
            {"home": home, "trial": t, "values": values, "contact": None, "errors": exc.errors},
            status_code=422,
        )
        resp.headers["Cache-Control"] = "no-store"
        return resp
    session.commit()
    flash(request, f"Contact details of {home.code} saved.")
    return _go(f"/homes/{home.code}")


# --- installations ------------------------------------------------------------------------------


def _device_choices(session: Session, trial: Trial) -> list[dict[str, Any]]:
    devices = session.scalars(
        select(Device).where(Device.trial_id == trial.id, Device.revoked.is_(False)).order_by(Device.serial)
    )
    out = []
    for d in devices:
        cur = installations_service.current_installation(session, d)
        out.append(
            {
                "serial": d.serial,
                "where": f"in {cur.home.code}, {cur.room.replace('_', ' ')}" if cur else "not installed",
            }
        )
    return out


@router.get("/homes/{code}/installations/new")
def install_form(
    code: str, request: Request, session: DbSession, user: User = Depends(require("installations.manage"))
) -> Response:
    home, t = _home_and_trial(session, code)
    return _page(
        request,
        user,
        "households/install.html",
        {
            "home": home,
            "trial": t,
            "devices": _device_choices(session, t),
            "errors": {},
            "values": {"installed_at": _now(request)},
        },
    )


@router.post("/homes/{code}/installations/new")
def install_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    values: dict[str, Any] = {k: _s(form, k) for k in ("device", "room", "installed_at", "move")}
    try:
        at = _local_dt(values["installed_at"], t.timezone, "installed_at")
        values["installed_at"] = at
        if not values["device"]:
            raise ValidationFailed("Pick a device.", {"device": "Pick a device."})
        device = devices_service.get_device(session, values["device"])
        result = service.install_device(
            session,
            home=home,
            device=device,
            room=values["room"],
            installed_at=at,
            actor=user,
            move=values["move"] == "yes",
        )
    except AppError as exc:
        errors = exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"device": exc.message}
        return _page(
            request,
            user,
            "households/install.html",
            {
                "home": home,
                "trial": t,
                "devices": _device_choices(session, t),
                "errors": errors,
                "values": values,
            },
            status_code=exc.status,
        )
    session.commit()
    if result.closed is not None:
        flash(request, f"Device {device.serial} moved from {result.closed.home.code} to {home.code}.")
    else:
        flash(request, f"Device {device.serial} installed in {home.code}.")
    if result.reattributed:
        flash(request, f"{result.reattributed} alert(s) were re-attributed to follow the new installation.")
    return _go(f"/homes/{home.code}")


def _installation_ctx(session: Session, home: Home, t: Trial, inst_id: int, **extra: Any) -> dict[str, Any]:
    inst = installations_service.get_installation(session, inst_id)
    if inst.home_id != home.id:
        raise AppError(f"Installation {inst_id} is not in {home.code}.", code="not_found", status=404)
    device = session.get(Device, inst.device_id)
    ctx: dict[str, Any] = {
        "home": home,
        "trial": t,
        "inst": inst,
        "device": device,
        "errors": {},
        "values": {},
    }
    ctx.update(extra)
    return ctx


@router.get("/homes/{code}/installations/{installation_id}")
def installation_page(
    code: str,
    installation_id: int,
    request: Request,
    session: DbSession,
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    return _page(
        request,
        user,
        "households/installation.html",
        _installation_ctx(session, home, t, installation_id, now=_now(request)),
    )


@router.post("/homes/{code}/installations/{installation_id}/remove")
def removal_submit(
    code: str,
    installation_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    ctx = _installation_ctx(session, home, t, installation_id, now=_now(request))
    try:
        at = _local_dt(_s(form, "removed_at"), t.timezone, "removed_at")
        installations_service.remove_installation(session, ctx["inst"], removed_at=at, actor=user)
    except AppError as exc:
        ctx["errors"] = (
            exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"removed_at": exc.message}
        )
        return _page(request, user, "households/installation.html", ctx, status_code=exc.status)
    session.commit()
    flash(request, f"Device {ctx['device'].serial} removed from {home.code}.")
    return _go(f"/homes/{home.code}")


@router.post("/homes/{code}/installations/{installation_id}/correct")
def correction_submit(
    code: str,
    installation_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    ctx = _installation_ctx(session, home, t, installation_id, now=_now(request))
    values = {k: _s(form, k) for k in ("installed_at", "removed_at", "room")}
    try:
        start = _local_dt(values["installed_at"], t.timezone, "fix_installed_at")
        end = _local_dt_or_none(values["removed_at"], t.timezone, "fix_removed_at")
        result = installations_service.correct_installation(
            session,
            ctx["inst"],
            installed_at=start,
            removed_at=end,
            room=values["room"],
            actor=user,
        )
    except AppError as exc:
        errs = (
            exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"installed_at": exc.message}
        )
        ctx["errors"] = {
            ("fix_" + k if k in ("installed_at", "removed_at", "room") else k): v for k, v in errs.items()
        }
        ctx["values"] = values
        session.expire(ctx["inst"])
        return _page(request, user, "households/installation.html", ctx, status_code=exc.status)
    session.commit()
    flash(request, f"Installation corrected; {result.reattributed} alert(s) re-attributed.")
    return _go(f"/homes/{home.code}")


# --- staged test events -------------------------------------------------------------------------


@router.post("/homes/{code}/staged-events")
def staged_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("staged.manage")),
) -> Response:
    home, t = _home_and_trial(session, code)
    values = {k: _s(form, k) for k in ("sound_class", "started_at", "ended_at", "source", "level_db")}
    try:
        start = _local_dt(values["started_at"], t.timezone, "started_at")
        end = _local_dt(values["ended_at"], t.timezone, "ended_at")
        level = None
        if values["level_db"]:
            try:
                level = float(values["level_db"])
            except ValueError:
                raise ValidationFailed(
                    "A sound level is a number.", {"level_db": "A number, in dB."}
                ) from None
        service.log_staged_event(
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
        return _page(
            request,
            user,
            "households/detail.html",
            _home_ctx(
                session,
                request,
                home,
                staged_errors=exc.errors or {"source": exc.message},
                staged_values=values,
            ),
            status_code=422,
        )
    session.commit()
    flash(request, f"Staged {values['sound_class'].replace('_', ' ')} test logged for {home.code}.")
    return _go(f"/homes/{home.code}#staged")


@router.post("/homes/{code}/staged-events/{event_id}/delete")
def staged_delete(
    code: str,
    event_id: int,
    request: Request,
    session: DbSession,
    user: User = Depends(require("staged.manage")),
) -> Response:
    home = service.get_home(session, code)
    ev = service.get_staged_event(session, event_id)
    if ev.home_id != home.id:
        raise AppError(f"Staged event {event_id} is not in {home.code}.", code="not_found", status=404)
    service.delete_staged_event(session, ev, actor=user)
    session.commit()
    flash(request, "Staged event deleted.")
    return _go(f"/homes/{home.code}#staged")


# --- withdrawal with erasure --------------------------------------------------------------------


def _leftovers(plan: erasure.ErasurePlan) -> int:
    """What an erased home still holds that a repeated erasure would remove (arrived since)."""
    return plan.clips_to_delete + plan.verdict_notes + plan.timeline_notes


@router.get("/homes/{code}/erase")
def erase_start(
    code: str, request: Request, session: DbSession, user: User = Depends(require("homes.erase"))
) -> Response:
    home, t = _home_and_trial(session, code)
    plan = erasure.plan_erasure(session, home)
    return _page(
        request,
        user,
        "households/erase.html",
        {"home": home, "trial": t, "step": 1, "errors": {}, "plan": plan, "leftovers": _leftovers(plan)},
    )


@router.post("/homes/{code}/erase/review")
def erase_review(
    code: str,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.erase")),
) -> Response:
    home, t = _home_and_trial(session, code)
    plan = erasure.plan_erasure(session, home)
    ctx: dict[str, Any] = {
        "home": home,
        "trial": t,
        "plan": plan,
        "errors": {},
        "step": 2,
        "note": _s(form, "note"),
        "leftovers": _leftovers(plan),
    }
    try:
        if home.erased_at is not None and not _leftovers(plan):
            raise ValidationFailed(
                f"{home.code} was already erased and nothing has arrived since.",
                {"confirm_code": "Already erased; nothing left to erase."},
            )
        erasure.check_confirm_code(home, _s(form, "confirm_code"))
    except ValidationFailed as exc:
        ctx.update(step=1, errors=exc.errors)
        return _page(request, user, "households/erase.html", ctx, status_code=422)
    ctx["ticket"] = erasure.erasure_ticket(settings.resolved_secret_key(), home, now=_now(request))
    return _page(request, user, "households/erase.html", ctx)


@router.post("/homes/{code}/erase")
def erase_submit(
    code: str,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    store: ClipStoreDep,
    form: FormData = Depends(form_data),
    user: User = Depends(require("homes.erase")),
) -> Response:
    home = service.get_home(session, code)
    result = erasure.erase_home(
        session,
        store,
        home,
        secret=settings.resolved_secret_key(),
        ticket=_s(form, "ticket"),
        confirm_code=_s(form, "confirm_code"),
        actor=user,
        now=_now(request),
        cache_dir=settings.cache_dir,
        note=_s(form, "note"),
    )
    session.commit()
    if result.complete:
        flash(
            request,
            f"{home.code} was withdrawn and erased: contact details removed, "
            f"{result.clips_deleted} clip file(s) deleted, {result.alerts_kept} de-identified alert "
            "record(s) kept.",
        )
    else:
        flash(
            request,
            f"The erasure of {home.code} is incomplete: {len(result.failed)} clip file(s) could not "
            "be removed. Run the erasure again; the problem was logged.",
            "bad",
        )
    return _go(f"/homes/{home.code}")


# --- quota --------------------------------------------------------------------------------------


def _bar(s: Any) -> dict[str, Any]:
    t = s.target
    scale = max(s.count, t.min_count or 0, t.max_count or 0, 1)
    return {
        "fill": round(100.0 * s.count / scale, 1),
        "min": round(100.0 * t.min_count / scale, 1) if t.min_count is not None else None,
        "max": round(100.0 * t.max_count / scale, 1) if t.max_count is not None else None,
    }


def _quota_ctx(session: Session, t: Trial, **extra: Any) -> dict[str, Any]:
    qv = views.quota_view(session, t)
    ctx: dict[str, Any] = {
        "trial": t,
        "trials": _trials(session),
        "qv": qv,
        "bars": {s.target.id: _bar(s) for s in qv.report.targets},
        "errors": {},
        "values": {},
        "specs": qv.catalogue,
        "all_states": HomeState.all,
        "next_states": lifecycle.NEXT,
    }
    ctx.update(extra)
    return ctx


@router.get("/quota")
def quota_page(
    request: Request,
    session: DbSession,
    trial: str | None = None,
    user: User = Depends(require("quota.view")),
) -> Response:
    t = trials_service.trial_in_view(session, trial)
    return _page(request, user, "households/quota.html", _quota_ctx(session, t))


@router.post("/quota/targets")
def target_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, _s(form, "trial") or None)
    values = {k: _s(form, k) for k in ("attribute_key", "value", "min_count", "max_count", "label")}
    try:
        service.add_target(
            session,
            t,
            attribute_key=values["attribute_key"] or None,
            value=values["value"] or None,
            min_count=_int(values["min_count"], "min_count"),
            max_count=_int(values["max_count"], "max_count"),
            label=values["label"],
            actor=user,
        )
    except ValidationFailed as exc:
        return _page(
            request,
            user,
            "households/quota.html",
            _quota_ctx(session, t, errors=exc.errors, values=values),
            status_code=422,
        )
    session.commit()
    flash(request, "Quota target added.")
    return _go(f"/quota?trial={t.code}")


@router.post("/quota/targets/{target_id}/delete")
def target_delete(
    target_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, _s(form, "trial") or None)
    service.delete_target(session, t, target_id, actor=user)
    session.commit()
    flash(request, "Quota target removed.")
    return _go(f"/quota?trial={t.code}")


@router.post("/quota/states")
def states_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, _s(form, "trial") or None)
    states = [v for v in form.getlist("states") if isinstance(v, str)]
    try:
        service.set_counting_states(session, t, states, actor=user)
    except ValidationFailed as exc:
        return _page(
            request,
            user,
            "households/quota.html",
            _quota_ctx(session, t, state_errors=exc.errors),
            status_code=422,
        )
    session.commit()
    flash(request, "The states that count toward the quota were saved.")
    return _go(f"/quota?trial={t.code}")
