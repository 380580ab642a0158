"""Quota API v1: the trial's quota report, its targets and the home states that count."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query

from server.auth.models import User
from server.deps import DbSession, require
from server.quota import schemas
from server.quota import service as quota_service
from server.trials import service as trials_service

router = APIRouter(prefix="/api/v1", tags=["register"])


def quota_out(view: quota_service.QuotaView) -> schemas.QuotaOut:
    r = view.report
    labels = {s.target.id: s.target.label for s in r.targets}
    warnings = [
        f"'{labels[tid]}' is below its minimum after "
        + ", ".join(f"{d.code} left on {d.at:%Y-%m-%d}" for d in ds)
        + "."
        for tid, ds in view.departures.items()
    ]
    return schemas.QuotaOut(
        trial=view.trial.code,
        counting_states=list(r.counting_states),
        counted=r.counted,
        by_state=dict(r.by_state),
        targets=[
            schemas.TargetOut(
                id=s.target.id,
                label=s.target.label,
                attribute_key=s.target.attribute_key,
                value=s.target.value,
                min_count=s.target.min_count,
                max_count=s.target.max_count,
                count=s.count,
                status=s.status,
                shortfall=s.shortfall,
                excess=s.excess,
                homes=list(s.homes),
            )
            for s in r.targets
        ],
        suggestions=[
            schemas.SuggestionOut(code=s.code, state=s.state, helps=view.suggestion_labels(s))
            for s in r.suggestions
        ],
        remaining_after={labels[k]: v for k, v in r.remaining_after.items()},
        rule=view.rule,
        warnings=warnings,
    )


@router.get("/quota", response_model=schemas.QuotaOut)
def api_quota(
    session: DbSession, trial: str | None = None, user: User = Depends(require("quota.view"))
) -> schemas.QuotaOut:
    return quota_out(quota_service.quota_view(session, trials_service.trial_in_view(session, trial)))


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
    return quota_out(quota_service.quota_view(session, t))


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
    return quota_out(quota_service.quota_view(session, t))


@router.put("/quota/states", response_model=schemas.QuotaOut)
def api_quota_states(
    body: schemas.QuotaStatesIn, session: DbSession, user: User = Depends(require("quota.manage"))
) -> schemas.QuotaOut:
    t = trials_service.trial_in_view(session, body.trial)
    quota_service.set_counting_states(session, t, body.states, actor=user)
    session.commit()
    return quota_out(quota_service.quota_view(session, t))
