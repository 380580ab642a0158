"""Trials: the default trial of a fresh data directory, creation and look-up."""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.errors import Conflict, NotFound, ValidationFailed
from server.trials.models import Trial

_CODE = re.compile(r"^[A-Z0-9][A-Z0-9_-]{1,39}$")
_CLASS = re.compile(r"^[a-z][a-z0-9_]{1,63}$")


def create_trial(session: Session, *, code: str, name: str, starts_on: dt.date,
                 sound_classes: list[str], ends_on: dt.date | None = None,
                 fa_target_per_home_month: float = 1.0, timezone: str = "UTC",
                 disturbance_window_s: float = 60.0, actor: object = "cli") -> Trial:
    code = code.strip().upper()
    errors: dict[str, str] = {}
    if not _CODE.match(code):
        errors["code"] = f"Trial code '{code}' must be 2-40 capital letters, digits, '-' or '_'."
    bad = [c for c in sound_classes if not _CLASS.match(c)]
    if not sound_classes or bad:
        errors["sound_classes"] = ("Give at least one sound class in snake_case"
                                   + (f"; not valid: {', '.join(bad)}." if bad else "."))
    if ends_on is not None and ends_on < starts_on:
        errors["ends_on"] = "The trial cannot end before it starts."
    if not (fa_target_per_home_month > 0):
        errors["fa_target_per_home_month"] = "The false-alarm target must be a positive rate."
    if not (0 <= disturbance_window_s <= 3600):
        errors["disturbance_window_s"] = "The disturbance window must be 0 to 3600 seconds."
    try:
        zoneinfo.ZoneInfo(timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        errors["timezone"] = f"'{timezone}' is not a known time zone name."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    if find_trial(session, code) is not None:
        raise Conflict(f"A trial with code {code} already exists.", code="trial_exists")
    trial = Trial(code=code, name=name or code, starts_on=starts_on, ends_on=ends_on,
                  sound_classes=list(dict.fromkeys(sound_classes)),
                  fa_target_per_home_month=fa_target_per_home_month, timezone=timezone,
                  disturbance_window_s=float(disturbance_window_s))
    session.add(trial)
    session.flush()
    # Every trial starts with the default household attribute catalogue.
    from server.households.catalogue import seed_default_catalogue

    seed_default_catalogue(session, trial)
    audit.record(session, actor if not isinstance(actor, str) else actor, "trial.create", "trial",
                 trial.id, {"code": code})  # type: ignore[arg-type]
    return trial


def find_trial(session: Session, code: str) -> Trial | None:
    return session.scalar(select(Trial).where(Trial.code == code.strip().upper()))


def get_trial(session: Session, code: str) -> Trial:
    trial = find_trial(session, code)
    if trial is None:
        raise NotFound(f"No trial has code {code}.", code="unknown_trial")
    return trial


def list_trials(session: Session) -> list[Trial]:
    return list(session.scalars(select(Trial).order_by(Trial.starts_on.desc(), Trial.code)))


def ensure_default_trial(session: Session, code: str, sound_classes: list[str]) -> Trial:
    """A fresh data directory gets one trial so that `device add` works straight away."""
    trial = find_trial(session, code)
    if trial is None:
        first = session.scalar(select(Trial).order_by(Trial.id))
        if first is not None:
            return first
        trial = create_trial(session, code=code, name="Default pilot", starts_on=dt.date.today(),
                             sound_classes=sound_classes)
    return trial
