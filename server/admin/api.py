"""Staff JSON API for admins: staff accounts and the audit trail."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path, Query, Request
from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictStr
from starlette.responses import JSONResponse, Response

from server.admin import service, trail
from server.auth.models import User
from server.deps import DbSession, require

UserId = Annotated[int, Path(ge=1, le=service.MAX_ID)]

router = APIRouter(prefix="/api/v1", tags=["admin"])

NO_STORE = {"Cache-Control": "no-store"}


class AccountOut(BaseModel):
    id: int
    email: str
    name: str
    role: str
    is_adjudicator: bool
    active: bool
    must_change_password: bool
    created_at: dt.datetime
    last_login_at: dt.datetime | None

    @classmethod
    def of(cls, user: User) -> AccountOut:
        return cls(
            id=user.id,
            email=user.email,
            name=user.name,
            role=user.role,
            is_adjudicator=user.is_adjudicator,
            active=user.active,
            must_change_password=user.must_change_password,
            created_at=user.created_at,
            last_login_at=user.last_login_at,
        )


class AccountIn(BaseModel):
    email: StrictStr = Field(max_length=254)
    name: StrictStr = Field("", max_length=200)
    role: StrictStr
    is_adjudicator: StrictBool = False


class AccountPatch(BaseModel):
    """Fields left out stay as they are."""

    model_config = ConfigDict(extra="forbid")

    role: StrictStr | None = None
    is_adjudicator: StrictBool | None = None
    active: StrictBool | None = None


class AccountChangeOut(BaseModel):
    account: AccountOut
    changed: bool
    sessions_ended: int


class TemporaryPasswordOut(BaseModel):
    account: AccountOut
    temporary_password: str = Field(description="Shown once; must be changed at the next sign-in.")


class AuditEventOut(BaseModel):
    id: int
    at: dt.datetime
    actor: str
    actor_id: int | None
    action: str
    object_type: str
    object_id: str | None
    detail: dict[str, Any]


class AuditPageOut(BaseModel):
    events: list[AuditEventOut]
    total: int
    page: int
    per_page: int
    pages: int


@router.get("/users", response_model=list[AccountOut])
def list_accounts(session: DbSession, user: User = Depends(require("users.manage"))) -> list[AccountOut]:
    return [AccountOut.of(u) for u in service.list_users(session)]


@router.post("/users", status_code=201, response_model=TemporaryPasswordOut)
def create_account(
    body: AccountIn, session: DbSession, user: User = Depends(require("users.manage"))
) -> Response:
    account, password = service.create_account(
        session,
        actor=user,
        email=body.email,
        name=body.name,
        role=body.role,
        is_adjudicator=body.is_adjudicator,
    )
    session.commit()
    out = TemporaryPasswordOut(account=AccountOut.of(account), temporary_password=password)
    return JSONResponse(out.model_dump(mode="json"), status_code=201, headers=NO_STORE)


@router.get("/users/{user_id}", response_model=AccountOut)
def get_account(
    user_id: UserId, session: DbSession, user: User = Depends(require("users.manage"))
) -> AccountOut:
    return AccountOut.of(service.get_user(session, user_id))


@router.patch("/users/{user_id}", response_model=AccountChangeOut)
def change_account(
    user_id: UserId, body: AccountPatch, session: DbSession, user: User = Depends(require("users.manage"))
) -> AccountChangeOut:
    """Role and adjudicator permission first, then the active flag; one transaction, all or nothing."""
    changed, ended = False, 0
    account = service.get_user(session, user_id)
    if body.role is not None or body.is_adjudicator is not None:
        c = service.change_access(
            session, actor=user, user_id=user_id, role=body.role, is_adjudicator=body.is_adjudicator
        )
        changed, ended = changed or c.changed, ended + c.sessions_ended
    if body.active is not None:
        c = (service.reactivate if body.active else service.deactivate)(session, actor=user, user_id=user_id)
        changed, ended = changed or c.changed, ended + c.sessions_ended
    session.commit()
    return AccountChangeOut(account=AccountOut.of(account), changed=changed, sessions_ended=ended)


@router.post("/users/{user_id}/password-reset", response_model=TemporaryPasswordOut)
def reset_password(
    user_id: UserId, session: DbSession, user: User = Depends(require("users.manage"))
) -> Response:
    account, password = service.reset_password(session, actor=user, user_id=user_id)
    session.commit()
    out = TemporaryPasswordOut(account=AccountOut.of(account), temporary_password=password)
    return JSONResponse(out.model_dump(mode="json"), headers=NO_STORE)


@router.get("/audit-events", response_model=AuditPageOut)
def list_audit_events(
    request: Request,
    session: DbSession,
    page: int = Query(1, ge=1, le=1_000_000),
    per_page: int = Query(trail.PER_PAGE, ge=1, le=trail.MAX_PER_PAGE),
    user: User = Depends(require("audit.view")),
) -> AuditPageOut:
    """Filters as query parameters: actor, action, home, object_type, object_id, since, until."""
    flt = trail.parse_filter(session, {k: request.query_params.get(k, "") for k in trail.FILTER_FIELDS})
    result = trail.list_events(session, flt, page=page, per_page=per_page)
    return AuditPageOut(
        events=[
            AuditEventOut(
                id=e.id,
                at=e.at,
                actor=e.actor_label,
                actor_id=e.actor_id,
                action=e.action,
                object_type=e.object_type,
                object_id=e.object_id,
                detail=e.detail or {},
            )
            for e in result.events
        ],
        total=result.total,
        page=result.page,
        per_page=result.per_page,
        pages=result.pages,
    )
