"""Quota API v1: the trial's quota report, its targets and the home states that count."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query

from server.auth.models import User
from server.deps import DbSession, require
from server.quota import schemas
from server.quota import service as quota_service
from server.trials import service as trials_service

router = APIRouter(prefix="/api/v1", tags=["register"])


@router.get("/quota", response_model=schemas.QuotaOut)
def api_quota(
    session: DbSession, trial: str | None = None, user: User = Depends(require("quota.view"))
) -> schemas.QuotaOut:
    return schemas.quota_out(quota_service.quota_view(session, trials_service.trial_in_view(session, trial)))


@router.post("/quota/targets", response_model=schemas.QuotaOut, status_code=201)
def api_add_target(
    body: schemas.TargetIn, session: DbSession, user: User = Depends(require("quota.manage"))
) -> schemas.QuotaOut:
    t = trials_service.trial_in_view(session, body.trial)
    quota_service.add_target(
        session,
        t,
        attribute_key=body.attribute_key,
        value=body.value,
        min_count=body.min_count,
        max_count=body.max_count,
        label=body.label,
        actor=user,
    )
    session.commit()
    return schemas.quota_out(quota_service.quota_view(session, t))


@router.delete("/quota/targets/{target_id}", response_model=schemas.QuotaOut)
def api_delete_target(
    target_id: int,
    session: DbSession,
    trial: str | None = Query(None),
    user: User = Depends(require("quota.manage")),
) -> schemas.QuotaOut:
    t = trials_service.trial_in_view(session, trial)
    quota_service.delete_target(session, t, target_id, actor=user)
    session.commit()
    return schemas.quota_out(quota_service.quota_view(session, t))


@router.put("/quota/states", response_model=schemas.QuotaOut)
def api_quota_states(
    body: schemas.QuotaStatesIn, session: DbSession, user: User = Depends(require("quota.manage"))
) -> schemas.QuotaOut:
    t = trials_service.trial_in_view(session, body.trial)
    quota_service.set_counting_states(session, t, body.states, actor=user)
    session.commit()
    return schemas.quota_out(quota_service.quota_view(session, t))
