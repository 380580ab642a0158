"""Trials: the default trial of a fresh data directory, creation and look-up."""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from typing import Any

from sqlalchemy import event, select
from sqlalchemy.orm import ORMExecuteState, Session, with_loader_criteria

from server import audit
from server.auth.models import User
from server.devices.models import Alert, Device
from server.errors import Conflict, NotFound, ValidationFailed
from server.households.catalogue import seed_default_catalogue
from server.households.models import AttributeDefinition, Home
from server.installations.models import Installation
from server.quota.models import QuotaTarget
from server.review.models import GoldCheck, Verdict
from server.roles import allowed
from server.staged.models import StagedEvent
from server.trials.models import Trial, TrialMembership

_CODE = re.compile(r"^[A-Z0-9][A-Z0-9_-]{1,39}$")
_CLASS = re.compile(r"^[a-z][a-z0-9_]{1,63}$")


def create_trial(
    session: Session,
    *,
    code: str,
    name: str,
    starts_on: dt.date,
    sound_classes: list[str],
    ends_on: dt.date | None = None,
    fa_target_per_home_month: float = 1.0,
    timezone: str = "UTC",
    disturbance_window_s: float = 60.0,
    actor: User | str = "cli",
) -> Trial:
    code = code.strip().upper()
    errors: dict[str, str] = {}
    if not _CODE.match(code):
        errors["code"] = f"Trial code '{code}' must be 2-40 capital letters, digits, '-' or '_'."
    bad = [c for c in sound_classes if not _CLASS.match(c)]
    if not sound_classes or bad:
        errors["sound_classes"] = "Give at least one sound class in snake_case" + (
            f"; not valid: {', '.join(bad)}." if bad else "."
        )
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
    trial = Trial(
        code=code,
        name=name or code,
        starts_on=starts_on,
        ends_on=ends_on,
        sound_classes=list(dict.fromkeys(sound_classes)),
        fa_target_per_home_month=fa_target_per_home_month,
        timezone=timezone,
        disturbance_window_s=float(disturbance_window_s),
    )
    session.add(trial)
    session.flush()
    # Every trial starts with the default household attribute catalogue.
    seed_default_catalogue(session, trial)
    audit.record(session, actor, "trial.create", "trial", trial.id, {"code": code})
    return trial


def set_trial_settings(
    session: Session,
    trial: Trial,
    *,
    fa_target_per_home_month: float | None = None,
    disturbance_window_s: float | None = None,
    actor: User | str = "cli",
) -> dict[str, Any]:
    """Change a running trial's false-alarm target or disturbance window (audited, old and new).

    Both change what the summary reports for every week, past ones too: the summary is computed
    from the alerts each time it is read, so no stored figure goes stale."""
    errors: dict[str, str] = {}
    if fa_target_per_home_month is not None and not (fa_target_per_home_month > 0):
        errors["fa_target_per_home_month"] = "The false-alarm target must be a positive rate."
    if disturbance_window_s is not None and not (0 <= disturbance_window_s <= 3600):
        errors["disturbance_window_s"] = "The disturbance window must be 0 to 3600 seconds."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    changes: dict[str, Any] = {}
    if fa_target_per_home_month is not None and fa_target_per_home_month != trial.fa_target_per_home_month:
        changes["fa_target_per_home_month"] = [
            trial.fa_target_per_home_month,
            float(fa_target_per_home_month),
        ]
        trial.fa_target_per_home_month = float(fa_target_per_home_month)
    if disturbance_window_s is not None and disturbance_window_s != trial.disturbance_window_s:
        changes["disturbance_window_s"] = [trial.disturbance_window_s, float(disturbance_window_s)]
        trial.disturbance_window_s = float(disturbance_window_s)
    if changes:
        session.flush()
        audit.record(session, actor, "trial.settings", "trial", trial.id, changes)
    return changes


def find_trial(session: Session, code: str) -> Trial | None:
    return session.scalar(select(Trial).where(Trial.code == code.strip().upper()))


def get_trial(session: Session, code: str, *, user: Any = None) -> Trial:
    """The trial with this code; 404 ``unknown_trial`` also when ``user`` may not see it."""
    trial = find_trial(session, code)
    if trial is None or (user is not None and not _sees(visible_trial_ids(session, user), trial.id)):
        raise NotFound(f"No trial has code {code}.", code="unknown_trial")
    return trial


def trial_in_view(session: Session, code: str | None, *, user: Any = None) -> Trial:
    """The trial meant: the named one, else the first trial the caller sees (``list_trials`` order).

    The one rule for every page, API call and command that takes an optional trial. Inside a
    request the session is already limited to the caller's trials; ``user`` gives the same answer
    outside one. 404 ``unknown_trial`` when the named trial is not visible or there is none yet.
    """
    if code:
        return get_trial(session, code, user=user)
    trials = list_trials(session, user=user)
    if not trials:
        raise NotFound("There is no trial yet; add one with `trialhouse trial add`.", code="unknown_trial")
    return trials[0]


def list_trials(session: Session, *, user: Any = None) -> list[Trial]:
    trials = list(session.scalars(select(Trial).order_by(Trial.starts_on.desc(), Trial.code)))
    if user is not None:
        ids = visible_trial_ids(session, user)
        trials = [t for t in trials if _sees(ids, t.id)]
    return trials


# --- Trial membership: which trials a staff member sees ------------------------------------------
#
# Admins see every trial. A non-admin with membership rows sees exactly those trials; one with no
# rows sees every trial (an installation with one pilot needs no set-up). The check is made once
# per request: ``limit_session_to_user`` (called by ``server.deps.require``) stores the visible
# trial ids on the request's Session, and from then on every ORM query of that session, reads
# and bulk UPDATE/DELETE alike, carries ``trial_id IN (...)`` for each trial-owned table (and for
# rows owned through a device or an alert). A route cannot forget it: another trial's home, device,
# alert or installation is simply not found, with the route's own not-found code.

SCOPE_KEY = "trialhouse_visible_trials"
# ``stmt.execution_options(**ACROSS_TRIALS)``: a uniqueness check that must see every trial (a
# serial or home code is unique everywhere); such a statement must not return rows to the user.
ALL_TRIALS = "trialhouse_all_trials"
ACROSS_TRIALS = {ALL_TRIALS: True}


def _sees(ids: set[int] | None, trial_id: int) -> bool:
    return ids is None or trial_id in ids


def membership_trial_ids(session: Session, user_id: int) -> set[int]:
    return set(session.scalars(select(TrialMembership.trial_id).where(TrialMembership.user_id == user_id)))


def visible_trial_ids(session: Session, user: Any) -> set[int] | None:
    """The ids of the trials ``user`` may see, or None for all of them."""
    role = getattr(user, "role", None)
    if role is not None and allowed(role, "trials.all"):
        return None
    ids = membership_trial_ids(session, user.id)
    return ids or None


def check_trial_access(
    session: Session, user: Any, trial_id: int, *, what: str = "trial", code: str = "unknown_trial"
) -> None:
    """404 (never 403: another trial's objects are not revealed) unless ``user`` sees the trial."""
    if not _sees(visible_trial_ids(session, user), trial_id):
        raise NotFound(f"No such {what}.", code=code)


def limit_session_to_user(session: Session, user: Any) -> set[int] | None:
    """Scope every later ORM query of ``session`` to the trials ``user`` sees; returns the ids."""
    ids = visible_trial_ids(session, user)
    if ids is None:
        session.info.pop(SCOPE_KEY, None)
    else:
        session.info[SCOPE_KEY] = frozenset(ids)
    return ids


def session_scope_ids(session: Session) -> frozenset[int] | None:
    return session.info.get(SCOPE_KEY)


def _scope_options(ids: frozenset[int]) -> list[Any]:
    keep = tuple(sorted(ids))
    opts: list[Any] = [with_loader_criteria(Trial, Trial.id.in_(keep), include_aliases=True)]
    for model in (Home, Device, Alert, StagedEvent, AttributeDefinition, QuotaTarget):
        opts.append(with_loader_criteria(model, model.trial_id.in_(keep), include_aliases=True))
    opts.append(
        with_loader_criteria(
            Installation,
            Installation.device_id.in_(select(Device.id).where(Device.trial_id.in_(keep))),
            include_aliases=True,
        )
    )
    for by_alert in (Verdict, GoldCheck):
        opts.append(
            with_loader_criteria(
                by_alert,
                by_alert.alert_id.in_(select(Alert.id).where(Alert.trial_id.in_(keep))),
                include_aliases=True,
            )
        )
    return opts


@event.listens_for(Session, "do_orm_execute")
def _apply_trial_scope(state: ORMExecuteState) -> None:
    ids = state.session.info.get(SCOPE_KEY)
    if ids is None or state.is_column_load or state.execution_options.get(ALL_TRIALS):
        return  # refreshing a row already loaded under the criteria
    if state.is_select or state.is_update or state.is_delete:
        state.statement = state.statement.options(*_scope_options(ids))


def set_memberships(session: Session, user: Any, trial_codes: list[str], *, actor: User | str) -> list[str]:
    """Limit ``user`` to these trials (an empty list: every trial again). Audited; ends nothing else.

    Returns the codes now held, sorted. Unknown codes fail with ``unknown_trial`` and change nothing.
    """
    wanted: dict[int, str] = {}
    for raw in trial_codes:
        if not raw.strip():
            continue
        trial = get_trial(session, raw)
        wanted[trial.id] = trial.code
    before = membership_trial_ids(session, user.id)
    for row in session.scalars(select(TrialMembership).where(TrialMembership.user_id == user.id)):
        if row.trial_id not in wanted:
            session.delete(row)
    for trial_id in sorted(set(wanted) - before):
        session.add(TrialMembership(user_id=user.id, trial_id=trial_id))
    session.flush()
    codes = sorted(wanted.values())
    if set(wanted) != before:
        old = sorted(session.scalars(select(Trial.code).where(Trial.id.in_(before)))) if before else []
        audit.record(
            session,
            actor,
            "user.trials",
            "user",
            user.id,
            {"email": user.email, "before": old, "after": codes},
        )
    return codes


def ensure_default_trial(session: Session, code: str, sound_classes: list[str]) -> Trial:
    """A fresh data directory gets one trial so that `device add` works straight away."""
    trial = find_trial(session, code)
    if trial is None:
        first = session.scalar(select(Trial).order_by(Trial.id))
        if first is not None:
            return first
        trial = create_trial(
            session, code=code, name="Default pilot", starts_on=dt.date.today(), sound_classes=sound_classes
        )
    return trial
