"""Admin pages: staff accounts (list, add, access, deactivate, reactivate, password reset) and the
audit trail viewer with its CSV download. Thin: each route calls one service function."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from starlette.responses import Response

from server.admin import service, trail
from server.auth.models import User
from server.deps import DbSession, require
from server.errors import AppError, ValidationFailed
from server.roles import REVIEWER, ROLES
from server.web.templating import render

router = APIRouter(include_in_schema=False)

NO_STORE = {"Cache-Control": "no-store"}  # pages that show a temporary password

DONE = {
    "access": "Access changed. Any session the person had open has ended.",
    "access-same": "Nothing to change: the account already had that access.",
    "deactivated": "Account deactivated. Its sessions ended and its API tokens stop working.",
    "already-inactive": "The account was already deactivated.",
    "reactivated": "Account reactivated. The person can sign in again with their password.",
    "already-active": "The account was already active.",
    "trials": "Trials saved. The account sees only the trials ticked (all of them when none is).",
}


def _staff_page(
    request: Request,
    session: DbSession,
    *,
    errors: dict[str, str] | None = None,
    form: dict[str, Any] | None = None,
    status_code: int = 200,
) -> Response:
    return render(
        request,
        "admin/staff.html",
        {
            "users": service.list_users(session),
            "roles": ROLES,
            "errors": errors or {},
            "form": form or {"email": "", "name": "", "role": REVIEWER, "is_adjudicator": False},
        },
        status_code=status_code,
    )


def _account_page(
    request: Request,
    session: DbSession,
    account: User,
    *,
    done: str | None = None,
    problem: str | None = None,
    temporary_password: str | None = None,
    created: bool = False,
    status_code: int = 200,
) -> Response:
    recent = trail.list_events(
        session, trail.TrailFilter(object_type="user", object_id=str(account.id)), per_page=10
    )
    return render(
        request,
        "admin/account.html",
        {
            "account": account,
            "roles": ROLES,
            "done": DONE.get(done or ""),
            "problem": problem,
            "temporary_password": temporary_password,
            "created": created,
            "recent": recent,
            "trial_choices": service.trial_choices(session, account.id),
        },
        status_code=status_code,
        headers=NO_STORE if temporary_password else None,
    )


@router.get("/admin/staff")
def staff_list(
    request: Request, session: DbSession, user: User = Depends(require("users.manage"))
) -> Response:
    return _staff_page(request, session)


@router.post("/admin/staff")
def staff_create(
    request: Request,
    session: DbSession,
    email: str = Form(""),
    name: str = Form(""),
    role: str = Form(""),
    is_adjudicator: str = Form(""),
    user: User = Depends(require("users.manage")),
) -> Response:
    form = {"email": email, "name": name, "role": role, "is_adjudicator": bool(is_adjudicator)}
    try:
        account, password = service.create_account(
            session, actor=user, email=email, name=name, role=role, is_adjudicator=bool(is_adjudicator)
        )
    except ValidationFailed as exc:
        session.rollback()
        return _staff_page(
            request, session, errors=exc.errors or {"email": exc.message}, form=form, status_code=422
        )
    except AppError as exc:  # user_exists
        session.rollback()
        return _staff_page(request, session, errors={"email": exc.message}, form=form, status_code=exc.status)
    session.commit()
    return _account_page(
        request, session, account, temporary_password=password, created=True, status_code=201
    )


@router.get("/admin/staff/{user_id}")
def account_page(
    request: Request,
    session: DbSession,
    user_id: int,
    done: str | None = None,
    user: User = Depends(require("users.manage")),
) -> Response:
    return _account_page(request, session, service.get_user(session, user_id), done=done)


def _after(request: Request, session: DbSession, user_id: int, action: Any) -> Response:
    """Run one account change; 303 back to the account page, or the page again with the refusal."""
    try:
        done = action()
    except AppError as exc:
        if exc.code == "unknown_user":
            raise
        session.rollback()
        return _account_page(
            request, session, service.get_user(session, user_id), problem=exc.message, status_code=exc.status
        )
    session.commit()
    return RedirectResponse(f"/admin/staff/{user_id}?done={done}", status_code=303)


@router.post("/admin/staff/{user_id}/access")
def account_access(
    request: Request,
    session: DbSession,
    user_id: int,
    role: str = Form(""),
    is_adjudicator: str = Form(""),
    user: User = Depends(require("users.manage")),
) -> Response:
    def act() -> str:
        change = service.change_access(
            session, actor=user, user_id=user_id, role=role, is_adjudicator=bool(is_adjudicator)
        )
        return "access" if change.changed else "access-same"

    return _after(request, session, user_id, act)


@router.post("/admin/staff/{user_id}/trials")
def account_trials(
    request: Request,
    session: DbSession,
    user_id: int,
    trial: list[str] = Form([]),
    user: User = Depends(require("users.manage")),
) -> Response:
    def act() -> str:
        service.set_trials(session, actor=user, user_id=user_id, trial_codes=trial)
        return "trials"

    return _after(request, session, user_id, act)


@router.post("/admin/staff/{user_id}/deactivate")
def account_deactivate(
    request: Request, session: DbSession, user_id: int, user: User = Depends(require("users.manage"))
) -> Response:
    def act() -> str:
        change = service.deactivate(session, actor=user, user_id=user_id)
        return "deactivated" if change.changed else "already-inactive"

    return _after(request, session, user_id, act)


@router.post("/admin/staff/{user_id}/reactivate")
def account_reactivate(
    request: Request, session: DbSession, user_id: int, user: User = Depends(require("users.manage"))
) -> Response:
    def act() -> str:
        change = service.reactivate(session, actor=user, user_id=user_id)
        return "reactivated" if change.changed else "already-active"

    return _after(request, session, user_id, act)


@router.post("/admin/staff/{user_id}/password-reset")
def account_password_reset(
    request: Request, session: DbSession, user_id: int, user: User = Depends(require("users.manage"))
) -> Response:
    account, password = service.reset_password(session, actor=user, user_id=user_id)
    session.commit()
    return _account_page(request, session, account, temporary_password=password)


# --- the audit trail ------------------------------------------------------------------------------


def _page_number(value: str | None) -> int:
    try:
        return max(1, min(int(value or 1), 1_000_000))
    except ValueError:
        return 1


@router.get("/admin/audit")
def audit_page(request: Request, session: DbSession, user: User = Depends(require("audit.view"))) -> Response:
    params = {k: request.query_params.get(k, "") for k in trail.FILTER_FIELDS}
    errors: dict[str, str] = {}
    try:
        flt = trail.parse_filter(session, params)
    except ValidationFailed as exc:
        errors = exc.errors
        flt = None
    result = (
        trail.list_events(session, flt, page=_page_number(request.query_params.get("page")))
        if flt is not None
        else None
    )
    return render(
        request,
        "admin/audit.html",
        {
            "params": params,
            "errors": errors,
            "result": result,
            "query": flt.query_items() if flt else [],
            "actions": trail.list_actions(session),
            "object_types": trail.list_object_types(session),
            "detail_text": trail.detail_text,
        },
        status_code=422 if errors else 200,
    )


@router.get("/admin/audit.csv")
def audit_csv(request: Request, session: DbSession, user: User = Depends(require("audit.view"))) -> Response:
    flt = trail.parse_filter(session, {k: request.query_params.get(k, "") for k in trail.FILTER_FIELDS})
    text, _ = trail.export_csv(session, flt, actor=user)
    session.commit()
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={
            "Content-Disposition": 'attachment; filename="audit-trail.csv"',
            "Cache-Control": "no-store",
        },
    )
