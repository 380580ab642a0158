"""Review API: claim clips, record verdicts, adjudicate, gold checks, the agreement overview."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import JSONResponse

from server.auth.models import User
from server.deps import DbSession, SettingsDep, require
from server.devices.models import Alert
from server.errors import NotFound
from server.review import image_cache, overview, queue, service
from server.review.schemas import (
    AdjudicationCaseOut,
    AdjudicationIn,
    ClaimIn,
    FinalOut,
    GoldCheckIn,
    GoldCheckOut,
    QueueItemOut,
    QueueOut,
    VerdictIn,
    VerdictOut,
)
from server.settings import Settings
from server.trials import service as trials_service

router = APIRouter(tags=["review"])


def review_key(request: Request, settings: Settings) -> bytes:
    """The routing key, derived once per app from its secret."""
    key = getattr(request.app.state, "review_key", None)
    if key is None:
        key = queue.routing_key(settings.resolved_secret_key())
        request.app.state.review_key = key
    return key


def trial_id_of(session: Any, code: str | None) -> int | None:
    if not code:
        return None
    trial = trials_service.find_trial(session, code)
    if trial is None:
        raise NotFound(f"No trial has code {code}.", code="unknown_trial")
    return trial.id


def prefetch(request: Request, view: queue.QueueView) -> None:
    image_cache.schedule(request.app, [i.clip_sha256 for i in (view.current, view.next) if i is not None])


@router.post(
    "/api/v1/review/claims",
    response_model=QueueOut,
    summary="Claim your current and next clip (renews your claims; releases any others)",
)
def api_claim(
    body: ClaimIn,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    user: User = Depends(require("review.work")),
) -> QueueOut:
    view = service.claim_next(
        session,
        reviewer=user,
        trial_id=trial_id_of(session, body.trial),
        sound_class=body.sound_class or None,
        claim_minutes=settings.claim_minutes,
        key=review_key(request, settings),
    )
    session.commit()
    prefetch(request, view)
    return QueueOut.of(view)


@router.delete("/api/v1/review/claims", summary="Give back every clip you hold")
def api_release(session: DbSession, user: User = Depends(require("review.work"))) -> dict[str, int]:
    n = queue.release_claims(session, reviewer=user)
    session.commit()
    return {"released": n}


@router.get("/api/v1/review/items/{alert_id}", response_model=QueueItemOut)
def api_item(alert_id: int, session: DbSession, user: User = Depends(require("review.work"))) -> QueueItemOut:
    return QueueItemOut.of(queue.get_review_item(session, reviewer=user, alert_id=alert_id))


@router.post(
    "/api/v1/alerts/{alert_id}/verdicts",
    response_model=VerdictOut,
    status_code=201,
    responses={403: {}, 404: {}, 409: {}, 422: {}},
)
def api_verdict(
    alert_id: int,
    body: VerdictIn,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    user: User = Depends(require("review.work")),
) -> VerdictOut:
    recorded = service.record_verdict(
        session,
        reviewer=user,
        alert_id=alert_id,
        label=body.label,
        cause=body.cause,
        resemblance=body.resemblance,
        note=body.note,
        private=body.private,
        key=review_key(request, settings),
    )
    session.commit()
    return VerdictOut.of(recorded)


@router.post("/api/v1/alerts/{alert_id}/private", summary="Flag the clip as private content")
def api_flag_private(
    alert_id: int, session: DbSession, user: User = Depends(require("clips.listen"))
) -> dict[str, Any]:
    alert = service.flag_private(session, user=user, alert_id=alert_id)
    session.commit()
    return {"alert_id": alert.id, "private": alert.private_flag}


@router.get("/api/v1/review/adjudications", response_model=list[AdjudicationCaseOut])
def api_adjudications(
    session: DbSession,
    trial: str | None = Query(None, max_length=40),
    user: User = Depends(require("review.adjudicate")),
) -> list[AdjudicationCaseOut]:
    cases = service.list_adjudications(session, adjudicator=user, trial_id=trial_id_of(session, trial))
    return [AdjudicationCaseOut.of(c) for c in cases]


@router.post(
    "/api/v1/alerts/{alert_id}/adjudication",
    response_model=FinalOut,
    status_code=201,
    responses={403: {}, 404: {}, 409: {}, 422: {}},
)
def api_adjudicate(
    alert_id: int,
    body: AdjudicationIn,
    session: DbSession,
    user: User = Depends(require("review.adjudicate")),
) -> FinalOut:
    service.adjudicate(
        session,
        adjudicator=user,
        alert_id=alert_id,
        label=body.label,
        cause=body.cause,
        resemblance=body.resemblance,
        note=body.note,
    )
    session.commit()
    alert = session.get(Alert, alert_id)
    assert alert is not None
    return FinalOut(
        alert_id=alert.id,
        final_label=alert.final_label,
        final_cause=alert.final_cause,
        final_resemblance=alert.final_resemblance,
        final_method=alert.final_method,
    )


@router.get("/api/v1/gold-checks", response_model=list[GoldCheckOut])
def api_gold_list(
    session: DbSession,
    trial: str | None = Query(None, max_length=40),
    user: User = Depends(require("review.gold")),
) -> list[GoldCheckOut]:
    rows = service.list_gold_checks(session, trial_id=trial_id_of(session, trial))
    return [
        GoldCheckOut(
            id=r.id,
            alert_id=r.alert_id,
            expected_label=r.expected_label,
            expected_cause=r.expected_cause,
            answers=r.answers,
            correct=r.correct,
            created_at=r.created_at,
        )
        for r in rows
    ]


@router.post(
    "/api/v1/gold-checks", response_model=GoldCheckOut, status_code=201, responses={404: {}, 409: {}, 422: {}}
)
def api_gold_create(
    body: GoldCheckIn, session: DbSession, user: User = Depends(require("review.gold"))
) -> GoldCheckOut:
    gold = service.mark_gold(
        session,
        user=user,
        alert_id=body.alert_id,
        expected_label=body.expected_label,
        expected_cause=body.expected_cause,
    )
    session.commit()
    return GoldCheckOut(
        id=gold.id,
        alert_id=gold.alert_id,
        expected_label=gold.expected_label,
        expected_cause=gold.expected_cause,
        created_at=gold.created_at,
    )


@router.get("/api/v1/review/overview", summary="Backlog, reviewer agreement and reviewer quality")
def api_overview(
    session: DbSession,
    trial: str | None = Query(None, max_length=40),
    user: User = Depends(require("review.agreement")),
) -> JSONResponse:
    ov = overview.review_overview(session, trial_id_of(session, trial))
    return JSONResponse(overview.overview_to_json(ov))
