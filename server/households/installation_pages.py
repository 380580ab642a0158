"""A home's installation pages: install or move a device, remove it, correct the dates or room.

They live with the register, not in server.installations, because they look homes and devices up
(the installations package imports neither). Thin routes over households.service.install_device
and installations.service.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Request
from sqlalchemy import select
from sqlalchemy.orm import Session
from starlette.datastructures import FormData
from starlette.responses import Response

from server.auth.models import User
from server.deps import DbSession, require
from server.devices import service as devices_service
from server.devices.models import Device
from server.errors import AppError, ValidationFailed
from server.households import forms, service
from server.households.models import Home
from server.installations import service as installations_service
from server.trials.models import Trial

router = APIRouter(include_in_schema=False)


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
    home, t = forms.home_and_trial(session, code)
    return forms.page(
        request,
        user,
        "households/install.html",
        {
            "home": home,
            "trial": t,
            "devices": _device_choices(session, t),
            "errors": {},
            "values": {"installed_at": forms.now(request)},
        },
    )


@router.post("/homes/{code}/installations/new")
def install_submit(
    code: str,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    values: dict[str, Any] = {k: forms.text(form, k) for k in ("device", "room", "installed_at", "move")}
    try:
        at = forms.local_dt(values["installed_at"], t.timezone, "installed_at")
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
        return forms.page(
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
        forms.flash(request, f"Device {device.serial} moved from {result.closed.home.code} to {home.code}.")
    else:
        forms.flash(request, f"Device {device.serial} installed in {home.code}.")
    if result.reattributed:
        forms.flash(
            request, f"{result.reattributed} alert(s) were re-attributed to follow the new installation."
        )
    return forms.go(f"/homes/{home.code}")


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
    home, t = forms.home_and_trial(session, code)
    return forms.page(
        request,
        user,
        "households/installation.html",
        _installation_ctx(session, home, t, installation_id, now=forms.now(request)),
    )


@router.post("/homes/{code}/installations/{installation_id}/remove")
def removal_submit(
    code: str,
    installation_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    ctx = _installation_ctx(session, home, t, installation_id, now=forms.now(request))
    try:
        at = forms.local_dt(forms.text(form, "removed_at"), t.timezone, "removed_at")
        installations_service.remove_installation(session, ctx["inst"], removed_at=at, actor=user)
    except AppError as exc:
        ctx["errors"] = (
            exc.errors if isinstance(exc, ValidationFailed) and exc.errors else {"removed_at": exc.message}
        )
        return forms.page(request, user, "households/installation.html", ctx, status_code=exc.status)
    session.commit()
    forms.flash(request, f"Device {ctx['device'].serial} removed from {home.code}.")
    return forms.go(f"/homes/{home.code}")


@router.post("/homes/{code}/installations/{installation_id}/correct")
def correction_submit(
    code: str,
    installation_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("installations.manage")),
) -> Response:
    home, t = forms.home_and_trial(session, code)
    ctx = _installation_ctx(session, home, t, installation_id, now=forms.now(request))
    values = {k: forms.text(form, k) for k in ("installed_at", "removed_at", "room")}
    try:
        start = forms.local_dt(values["installed_at"], t.timezone, "fix_installed_at")
        end = forms.local_dt_or_none(values["removed_at"], t.timezone, "fix_removed_at")
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
        return forms.page(request, user, "households/installation.html", ctx, status_code=exc.status)
    session.commit()
    forms.flash(request, f"Installation corrected; {result.reattributed} alert(s) re-attributed.")
    return forms.go(f"/homes/{home.code}")
