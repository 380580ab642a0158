"""One home's pages: its overview, attributes, lifecycle steps, consent, contact details (personal
data) and withdrawal with erasure. Thin routes over households.service and households.erasure.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from fastapi import APIRouter, Depends, Request
from sqlalchemy.orm import Session
from starlette.datastructures import FormData
from starlette.responses import Response

from server.auth.models import User
from server.db import begin_write
from server.deps import ClipStoreDep, DbSession, SettingsDep, require
from server.errors import AppError, ValidationFailed
from server.households import catalogue, erasure, forms, service, views
from server.households.models import Home, HomeState

router = APIRouter(include_in_schema=False)


# --- one home -----------------------------------------------------------------------------------


def home_ctx(session: Session, request: Request, home: Home, **extra: Any) -> dict[str, Any]:
    ov = views.home_overview(session, home, now=forms.now(request))
    ctx: dict[str, Any] = {
        "ov": ov,
        "home": home,
        "trial": ov.trial,
        "errors": {},
        "values": {},
        "now_local": forms.now(request),
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
    return forms.page(request, user, "households/detail.html", home_ctx(session, request, home))


@router.get("/homes/{code}/edit")
def edit_home_form(
    code: str, request: Request, session: DbSession, user: User = Depends(require("homes.manage"))
) -> Response:
    home, t = forms.home_and_trial(session, code)
    values = {k: catalogue.format_value(v) for k, v in (home.attributes or {}).items()}
    return forms.page(
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
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    specs = catalogue.list_catalogue(session, t)
    values = forms.attribute_values(form, specs)
    try:
        service.update_attributes(session, home, values, actor=user)
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "households/edit.html",
            {"home": home, "trial": t, "values": values, "specs": specs, "errors": exc.errors},
            status_code=422,
        )
    session.commit()
    forms.flash(request, f"Attributes of {home.code} saved.")
    return forms.go(f"/homes/{home.code}")


@router.post("/homes/{code}/state")
def state_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    try:
        at = forms.local_dt_or_none(forms.text(form, "at"), t.timezone, "at") or forms.now(request)
        result = service.transition(
            session,
            home,
            forms.text(form, "to_state"),
            actor=user,
            at=at,
            note=forms.text(form, "note"),
            listening=forms.text(form, "listening") != "no",
        )
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "households/detail.html",
            home_ctx(session, request, home, state_errors=exc.errors or {"to_state": exc.message}),
            status_code=422,
        )
    except AppError as exc:
        return forms.page(
            request,
            user,
            "households/detail.html",
            home_ctx(session, request, home, state_errors={"to_state": exc.message}),
            status_code=exc.status,
        )
    session.commit()
    forms.flash(request, f"{home.code} is now {home.state}.")
    for inst in result.closed:
        forms.flash(request, f"The installation in the {inst.room.replace('_', ' ')} was closed.")
    for w in result.warnings:
        forms.flash(request, w, "warn")
    return forms.go(f"/homes/{home.code}")


@router.post("/homes/{code}/consent")
def consent_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    try:
        raw_day = forms.text(form, "consented_on")
        try:
            day = dt.date.fromisoformat(raw_day)
        except ValueError:
            raise ValidationFailed(
                "Give the date the form was signed.", {"consented_on": "Give the date the form was signed."}
            ) from None
        retention = forms.whole_number(forms.text(form, "retention_days"), "retention_days")
        service.record_consent(
            session,
            home,
            form_version=forms.text(form, "form_version"),
            consented_on=day,
            staff_may_listen=forms.text(form, "staff_may_listen") == "yes",
            retention_days=retention if retention is not None else 0,
            actor=user,
            mark_consented=forms.text(form, "mark_consented") == "yes",
            today=forms.now(request).date(),
        )
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "households/detail.html",
            home_ctx(
                session,
                request,
                home,
                consent_errors=exc.errors or {"form_version": exc.message},
                consent_values=dict(form),
            ),
            status_code=422,
        )
    except AppError as exc:
        return forms.page(
            request,
            user,
            "households/detail.html",
            home_ctx(
                session,
                request,
                home,
                consent_errors={"form_version": exc.message},
                consent_values=dict(form),
            ),
            status_code=exc.status,
        )
    session.commit()
    forms.flash(
        request,
        f"Consent recorded for {home.code}"
        + (f"; it is now {home.state}." if home.state == HomeState.consented else "."),
    )
    return forms.go(f"/homes/{home.code}")


# --- personal data ------------------------------------------------------------------------------


@router.get("/homes/{code}/contact")
def contact_page(
    code: str, request: Request, session: DbSession, user: User = Depends(require("personal.view"))
) -> Response:
    begin_write(session)  # the view writes an audit row
    home, t = forms.home_and_trial(session, code)
    contact = service.view_contact(session, home, actor=user, via="page")
    session.commit()
    values = {f: getattr(contact, f) if contact else "" for f in service.CONTACT_FIELDS}
    resp = forms.page(
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
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("personal.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    values = {f: forms.text(form, f) for f in service.CONTACT_FIELDS}
    try:
        service.set_contact(session, home, actor=user, **values)
    except ValidationFailed as exc:
        resp = forms.page(
            request,
            user,
            "households/contact.html",
            {"home": home, "trial": t, "values": values, "contact": None, "errors": exc.errors},
            status_code=422,
        )
        resp.headers["Cache-Control"] = "no-store"
        return resp
    session.commit()
    forms.flash(request, f"Contact details of {home.code} saved.")
    return forms.go(f"/homes/{home.code}")


# --- withdrawal with erasure --------------------------------------------------------------------


def _leftovers(plan: erasure.ErasurePlan) -> int:
    """What an erased home still holds that a repeated erasure would remove (arrived since)."""
    return plan.clips_to_delete + plan.verdict_notes + plan.timeline_notes


@router.get("/homes/{code}/erase")
def erase_start(
    code: str, request: Request, session: DbSession, user: User = Depends(require("homes.erase"))
) -> Response:
    home, t = forms.home_and_trial(session, code)
    plan = erasure.plan_erasure(session, home)
    return forms.page(
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
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.erase")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    plan = erasure.plan_erasure(session, home)
    ctx: dict[str, Any] = {
        "home": home,
        "trial": t,
        "plan": plan,
        "errors": {},
        "step": 2,
        "note": forms.text(form, "note"),
        "leftovers": _leftovers(plan),
    }
    try:
        if home.erased_at is not None and not _leftovers(plan):
            raise ValidationFailed(
                f"{home.code} was already erased and nothing has arrived since.",
                {"confirm_code": "Already erased; nothing left to erase."},
            )
        erasure.check_confirm_code(home, forms.text(form, "confirm_code"))
    except ValidationFailed as exc:
        ctx.update(step=1, errors=exc.errors)
        return forms.page(request, user, "households/erase.html", ctx, status_code=422)
    ctx["ticket"] = erasure.erasure_ticket(settings.resolved_secret_key(), home, now=forms.now(request))
    return forms.page(request, user, "households/erase.html", ctx)


@router.post("/homes/{code}/erase")
def erase_submit(
    code: str,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    store: ClipStoreDep,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("homes.erase")),
) -> Response:
    home = service.get_home(session, code)
    result = erasure.erase_home(
        session,
        store,
        home,
        secret=settings.resolved_secret_key(),
        ticket=forms.text(form, "ticket"),
        confirm_code=forms.text(form, "confirm_code"),
        actor=user,
        now=forms.now(request),
        cache_dir=settings.cache_dir,
        note=forms.text(form, "note"),
    )
    session.commit()
    if result.complete:
        forms.flash(
            request,
            f"{home.code} was withdrawn and erased: contact details removed, "
            f"{result.clips_deleted} clip file(s) deleted, {result.alerts_kept} de-identified alert "
            "record(s) kept.",
        )
    else:
        forms.flash(
            request,
            f"The erasure of {home.code} is incomplete: {len(result.failed)} clip file(s) could not "
            "be removed. Run the erasure again; the problem was logged.",
            "bad",
        )
    return forms.go(f"/homes/{home.code}")
