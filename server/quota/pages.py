"""Quota pages: the trial's targets with their counts, who to recruit next, adding and removing
targets, and the home states that count. Thin routes over quota.service.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Request
from sqlalchemy.orm import Session
from starlette.datastructures import FormData
from starlette.responses import Response

from server.auth.models import User
from server.deps import DbSession, require
from server.errors import ValidationFailed
from server.households import forms, lifecycle
from server.households.models import HomeState
from server.quota import service as quota_service
from server.trials import service as trials_service
from server.trials.models import Trial

router = APIRouter(include_in_schema=False)


def _bar(s: Any) -> dict[str, Any]:
    t = s.target
    scale = max(s.count, t.min_count or 0, t.max_count or 0, 1)
    return {
        "fill": round(100.0 * s.count / scale, 1),
        "min": round(100.0 * t.min_count / scale, 1) if t.min_count is not None else None,
        "max": round(100.0 * t.max_count / scale, 1) if t.max_count is not None else None,
    }


def _quota_ctx(session: Session, t: Trial, **extra: Any) -> dict[str, Any]:
    qv = quota_service.quota_view(session, t)
    ctx: dict[str, Any] = {
        "trial": t,
        "trials": trials_service.list_trials(session),
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
    return forms.page(request, user, "quota/quota.html", _quota_ctx(session, t))


@router.post("/quota/targets")
def target_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, forms.text(form, "trial") or None)
    values = {k: forms.text(form, k) for k in ("attribute_key", "value", "min_count", "max_count", "label")}
    try:
        quota_service.add_target(
            session,
            t,
            attribute_key=values["attribute_key"] or None,
            value=values["value"] or None,
            min_count=forms.whole_number(values["min_count"], "min_count"),
            max_count=forms.whole_number(values["max_count"], "max_count"),
            label=values["label"],
            actor=user,
        )
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "quota/quota.html",
            _quota_ctx(session, t, errors=exc.errors, values=values),
            status_code=422,
        )
    session.commit()
    forms.flash(request, "Quota target added.")
    return forms.go(f"/quota?trial={t.code}")


@router.post("/quota/targets/{target_id}/delete")
def target_delete(
    target_id: int,
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, forms.text(form, "trial") or None)
    quota_service.delete_target(session, t, target_id, actor=user)
    session.commit()
    forms.flash(request, "Quota target removed.")
    return forms.go(f"/quota?trial={t.code}")


@router.post("/quota/states")
def states_submit(
    request: Request,
    session: DbSession,
    form: FormData = Depends(forms.form_data),
    user: User = Depends(require("quota.manage")),
) -> Response:
    t = trials_service.trial_in_view(session, forms.text(form, "trial") or None)
    states = [v for v in form.getlist("states") if isinstance(v, str)]
    try:
        quota_service.set_counting_states(session, t, states, actor=user)
    except ValidationFailed as exc:
        return forms.page(
            request,
            user,
            "quota/quota.html",
            _quota_ctx(session, t, state_errors=exc.errors),
            status_code=422,
        )
    session.commit()
    forms.flash(request, "The states that count toward the quota were saved.")
    return forms.go(f"/quota?trial={t.code}")
