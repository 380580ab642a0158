"""Staff JSON API for one's own personal API tokens: list (with last use), create, revoke."""

from __future__ import annotations

import datetime as dt

from fastapi import APIRouter, Depends, Request
from pydantic import BaseModel, ConfigDict, Field
from sqlalchemy.orm import Session

from server.auth import service
from server.auth.models import ApiToken, User
from server.deps import DbSession, SettingsDep, auth_now, require
from server.errors import Forbidden

router = APIRouter(prefix="/api/v1/account", tags=["account"])


class TokenOut(BaseModel):
    id: int
    label: str
    created_at: dt.datetime
    expires_at: dt.datetime
    last_used_at: dt.datetime | None
    revoked_at: dt.datetime | None
    state: str  # "live", "expired" or "revoked"

    @classmethod
    def of(cls, row: ApiToken, now: dt.datetime) -> TokenOut:
        return cls(
            id=row.id,
            label=row.label,
            created_at=row.created_at,
            expires_at=row.expires_at,
            last_used_at=row.last_used_at,
            revoked_at=row.revoked_at,
            state=row.state(now),
        )


class TokenList(BaseModel):
    tokens: list[TokenOut]


class TokenIn(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    label: str = Field(min_length=1, max_length=100)
    days: int | None = Field(default=None, ge=1)


class TokenCreated(BaseModel):
    token: TokenOut
    secret: str  # shown once; only its SHA-256 is kept


def _list(session: Session, user: User, now: dt.datetime) -> TokenList:
    return TokenList(tokens=[TokenOut.of(t, now) for t in service.list_api_tokens(session, user.id)])


@router.get("/tokens", response_model=TokenList)
def list_tokens(
    request: Request, session: DbSession, user: User = Depends(require("staff.self"))
) -> TokenList:
    return _list(session, user, auth_now(request))


@router.post("/tokens", response_model=TokenCreated, status_code=201)
def create_token(
    request: Request,
    body: TokenIn,
    session: DbSession,
    settings: SettingsDep,
    user: User = Depends(require("staff.self")),
) -> TokenCreated:
    """Only a signed-in browser session may create a token: a token minting tokens would let a
    leaked one outlive its expiry date."""
    if request.state.via_token:
        raise Forbidden("A personal API token cannot create tokens; create one on your account page.")
    now = auth_now(request)
    row, secret = service.create_api_token(
        session,
        user,
        body.label,
        days=body.days or settings.api_token_days,
        max_days=settings.api_token_max_days,
        now=now,
    )
    session.commit()
    return TokenCreated(token=TokenOut.of(row, now), secret=secret)


@router.delete("/tokens/{token_id}", response_model=TokenOut)
def revoke_token(
    request: Request, token_id: int, session: DbSession, user: User = Depends(require("staff.self"))
) -> TokenOut:
    now = auth_now(request)
    row = service.revoke_api_token(session, token_id, by=user, now=now)
    session.commit()
    return TokenOut.of(row, now)
