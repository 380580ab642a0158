"""Staged test events: log, list and delete the test sounds played on purpose in homes. Analytics
matches alerts against them (``analytics.staged``). Services flush and never commit.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.errors import NotFound, ValidationFailed
from server.households import service as households_service
from server.households.models import Home
from server.installations import service as installations_service
from server.installations.service import as_utc
from server.staged.models import StagedEvent
from server.trials.models import Trial

Actor = User | str

MAX_STAGED = dt.timedelta(hours=6)


def log_staged_event(
    session: Session,
    *,
    home: Home,
    sound_class: str,
    started_at: dt.datetime,
    ended_at: dt.datetime,
    source: str,
    level_db: float | None = None,
    actor: Actor = "cli",
) -> StagedEvent:
    """Record a test sound played on purpose in a home (analytics matches alerts against it)."""
    trial = households_service.trial_of(session, home)
    errors: dict[str, str] = {}
    started_at, ended_at = as_utc(started_at, "started_at"), as_utc(ended_at, "ended_at")
    source = (source or "").strip()
    if sound_class not in trial.sound_classes:
        errors["sound_class"] = f"Pick one of the trial's sound classes: {', '.join(trial.sound_classes)}."
    if ended_at <= started_at:
        errors["ended_at"] = "The end must come after the start."
    elif ended_at - started_at > MAX_STAGED:
        errors["ended_at"] = "A staged event lasts at most 6 hours; log longer tests as several events."
    if not source or len(source) > 500:
        errors["source"] = "Say what was played and where (1 to 500 characters)."
    if level_db is not None and not -20.0 <= float(level_db) <= 160.0:
        errors["level_db"] = "A sound level is between -20 and 160 dB."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    if not installations_service.home_had_device_during(session, home.id, started_at, ended_at):
        raise ValidationFailed(
            f"No device was installed in {home.code} at that time, so nothing could hear the test.",
            {"started_at": "No device was installed then."},
        )
    event = StagedEvent(
        trial_id=trial.id,
        home_id=home.id,
        sound_class=sound_class,
        started_at=started_at,
        ended_at=ended_at,
        source=source,
        level_db=float(level_db) if level_db is not None else None,
        created_by_id=actor.id if isinstance(actor, User) else None,
    )
    session.add(event)
    session.flush()
    return event


def list_staged_events(
    session: Session, *, trial: Trial | None = None, home: Home | None = None
) -> list[StagedEvent]:
    q = select(StagedEvent).order_by(StagedEvent.started_at.desc(), StagedEvent.id.desc())
    if trial is not None:
        q = q.where(StagedEvent.trial_id == trial.id)
    if home is not None:
        q = q.where(StagedEvent.home_id == home.id)
    return list(session.scalars(q))


def get_staged_event(session: Session, event_id: int) -> StagedEvent:
    event = session.get(StagedEvent, event_id)
    if event is None:
        raise NotFound(f"No staged event has id {event_id}.", code="unknown_staged_event")
    return event


def delete_staged_event(session: Session, event: StagedEvent, *, actor: Actor = "cli") -> None:
    audit.record(
        session,
        actor,
        "staged_event.delete",
        "staged_event",
        event.id,
        {
            "home_id": event.home_id,
            "sound_class": event.sound_class,
            "started_at": event.started_at.isoformat(),
        },
    )
    session.delete(event)
    session.flush()
