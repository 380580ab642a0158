"""Staged-event API v1: list, log and delete test sounds played in homes."""

from __future__ import annotations

from fastapi import APIRouter, Depends
from fastapi.responses import Response
from sqlalchemy.orm import Session

from server.auth.models import User
from server.deps import DbSession, require
from server.households import service as households_service
from server.households.models import Home
from server.staged import schemas
from server.staged import service as staged_service
from server.staged.models import StagedEvent
from server.trials import service as trials_service
from server.trials.models import Trial

router = APIRouter(prefix="/api/v1", tags=["register"])


def staged_out(session: Session, ev: StagedEvent) -> schemas.StagedEventOut:
    home = session.get(Home, ev.home_id)
    trial = session.get(Trial, ev.trial_id)
    assert home is not None and trial is not None
    return schemas.StagedEventOut(
        id=ev.id,
        trial=trial.code,
        home=home.code,
        sound_class=ev.sound_class,
        started_at=ev.started_at,
        ended_at=ev.ended_at,
        source=ev.source,
        level_db=ev.level_db,
    )


# --- homes --------------------------------------------------------------------------------------


@router.get("/staged-events", response_model=list[schemas.StagedEventOut])
def api_staged_events(
    session: DbSession,
    trial: str | None = None,
    home: str | None = None,
    user: User = Depends(require("homes.view")),
) -> list[schemas.StagedEventOut]:
    h = households_service.get_home(session, home) if home else None
    t = trials_service.trial_in_view(session, trial) if (trial or h is None) else None
    return [staged_out(session, e) for e in staged_service.list_staged_events(session, trial=t, home=h)]


@router.post("/staged-events", response_model=schemas.StagedEventOut, status_code=201)
def api_log_staged(
    body: schemas.StagedEventIn, session: DbSession, user: User = Depends(require("staged.manage"))
) -> schemas.StagedEventOut:
    ev = staged_service.log_staged_event(
        session,
        home=households_service.get_home(session, body.home),
        sound_class=body.sound_class,
        started_at=body.started_at,
        ended_at=body.ended_at,
        source=body.source,
        level_db=body.level_db,
        actor=user,
    )
    session.commit()
    return staged_out(session, ev)


@router.delete("/staged-events/{event_id}", status_code=204, response_class=Response)
def api_delete_staged(
    event_id: int, session: DbSession, user: User = Depends(require("staged.manage"))
) -> Response:
    event = staged_service.get_staged_event(session, event_id)
    staged_service.delete_staged_event(session, event, actor=user)
    session.commit()
    return Response(status_code=204)
