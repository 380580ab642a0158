"""The household register: homes, lifecycle transitions, consent, personal data, attributes, and
the home's side of installing a device (the installation itself is server.installations).

One function per action, serving the pages, the JSON API and the CLI alike. Services take a
Session and plain values, flush and never commit.
"""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.db import utcnow
from server.errors import Conflict, IllegalTransition, NotFound, ValidationFailed
from server.households import catalogue, lifecycle
from server.households.catalogue import seed_default_catalogue  # noqa: F401  (re-exported)
from server.households.models import (
    Consent,
    Home,
    HomeContact,
    HomeState,
    HomeStateChange,
)
from server.installations import service as installations_service
from server.installations.models import DeviceRef, Installation
from server.installations.service import InstallResult, as_utc, when
from server.quota import rules as quota
from server.quota import service as quota_service
from server.trials.models import Trial

Actor = User | str

CODE_PATTERN = re.compile(r"^H-\d{4,6}$")
SORTS = ("code", "state", "changed", "created")
CONTACT_FIELDS = ("names", "address", "phone", "email", "access_notes")
EMAIL_PATTERN = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")
PHONE_PATTERN = re.compile(r"^[0-9+() .\-/]{3,60}$")


def _by_id(actor: Actor | None) -> int | None:
    return actor.id if isinstance(actor, User) else None


# --- look-ups -----------------------------------------------------------------------------------


def find_home(session: Session, code: str) -> Home | None:
    return session.scalar(select(Home).where(Home.code == code.strip().upper()))


def get_home(session: Session, code: str) -> Home:
    home = find_home(session, code)
    if home is None:
        raise NotFound(f"No home has code {code}.", code="unknown_home")
    return home


def trial_of(session: Session, home: Home) -> Trial:
    trial = session.get(Trial, home.trial_id)
    assert trial is not None
    return trial


def latest_consent(session: Session, home: Home) -> Consent | None:
    return session.scalar(
        select(Consent)
        .where(Consent.home_id == home.id)
        .order_by(Consent.recorded_at.desc(), Consent.id.desc())
        .limit(1)
    )


def list_homes(
    session: Session,
    trial: Trial,
    *,
    state: str | None = None,
    attribute: str | None = None,
    value: Any = None,
    sort: str = "code",
    descending: bool = False,
) -> list[Home]:
    """Homes of a trial, filtered by state and by one attribute (value None: any answer)."""
    q = select(Home).where(Home.trial_id == trial.id)
    if state:
        if state not in HomeState.all:
            raise ValidationFailed(f"'{state}' is not a home state.", {"state": "Pick one of the states."})
        q = q.where(Home.state == state)
    order = {
        "code": Home.code,
        "state": Home.state,
        "changed": Home.state_changed_at,
        "created": Home.created_at,
    }.get(sort)
    if order is None:
        raise ValidationFailed(f"Sort by one of: {', '.join(SORTS)}.", {"sort": "Unknown sort."})
    q = q.order_by(order.desc() if descending else order.asc(), Home.code)
    homes = list(session.scalars(q))
    if attribute:
        # Attributes are a JSON column; matching in Python keeps one query for both backends.
        target = quota.Target(0, "", attribute, value, None, None)
        homes = [h for h in homes if quota.matches(target, h.attributes or {})]
    return homes


def state_counts(session: Session, trial: Trial) -> dict[str, int]:
    rows = session.execute(
        select(Home.state, func.count(Home.id)).where(Home.trial_id == trial.id).group_by(Home.state)
    )
    counts = dict.fromkeys(HomeState.all, 0)
    counts.update({s: int(n) for s, n in rows})
    return counts


def timeline_of(session: Session, home: Home) -> list[tuple[HomeStateChange, User | None]]:
    rows = session.execute(
        select(HomeStateChange, User)
        .outerjoin(User, User.id == HomeStateChange.by_id)
        .where(HomeStateChange.home_id == home.id)
        .order_by(HomeStateChange.at, HomeStateChange.id)
    )
    return [(c, u) for c, u in rows]


# --- homes and attributes -----------------------------------------------------------------------


def next_home_code(session: Session) -> str:
    codes = session.scalars(
        select(Home.code).where(Home.code.like("H-%")).execution_options(trialhouse_all_trials=True)
    )  # unique in every trial
    numbers = [int(c[2:]) for c in codes if CODE_PATTERN.match(c)]
    return f"H-{(max(numbers, default=0) + 1):04d}"


def _check_attributes(session: Session, trial: Trial, values: Mapping[str, Any]) -> dict[str, Any]:
    clean, errors = catalogue.validate_attributes(catalogue.list_catalogue(session, trial), values)
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    return clean


def create_home(
    session: Session,
    trial: Trial,
    *,
    attributes: Mapping[str, Any] | None = None,
    code: str | None = None,
    actor: Actor = "cli",
    at: dt.datetime | None = None,
    note: str | None = None,
) -> Home:
    """A new candidate home with a generated code (or the given one), its first timeline entry."""
    clean = _check_attributes(session, trial, attributes or {})
    at = as_utc(at, "at") if at else utcnow()
    if code is not None:
        code = code.strip().upper()
        if not CODE_PATTERN.match(code):
            raise ValidationFailed(
                f"Home code '{code}' must read H- and 4 to 6 digits, e.g. H-0007.",
                {"code": "Codes read H- and 4 to 6 digits, e.g. H-0007."},
            )
        if find_home(session, code) is not None:
            raise Conflict(f"Home code {code} is already taken.", code="home_exists")
    for _attempt in range(5):
        home = Home(
            trial_id=trial.id,
            code=code or next_home_code(session),
            state=HomeState.candidate,
            state_changed_at=at,
            attributes=clean,
            created_at=at,
        )
        try:
            with session.begin_nested():
                session.add(home)
                session.flush()
            break
        except IntegrityError:
            # A simultaneous creation took the same code.
            if code is not None:
                raise Conflict(f"Home code {code} is already taken.", code="home_exists") from None
    else:  # pragma: no cover - five collisions in a row
        raise Conflict("Could not pick a free home code; try again.", code="home_exists")
    session.add(
        HomeStateChange(
            home_id=home.id,
            from_state=None,
            to_state=HomeState.candidate,
            at=at,
            by_id=_by_id(actor),
            note=_note(note),
        )
    )
    session.flush()
    return home


def _note(note: str | None) -> str | None:
    note = (note or "").strip()
    if len(note) > 2000:
        raise ValidationFailed("A note is at most 2000 characters.", {"note": "At most 2000 characters."})
    return note or None


def update_attributes(
    session: Session, home: Home, values: Mapping[str, Any], *, actor: Actor = "cli", merge: bool = False
) -> Home:
    """Replace the home's answers (``merge``: change only the given keys; None removes one)."""
    _refuse_if_erased(home, "change its attributes")
    trial = trial_of(session, home)
    if merge:
        given = {k: v for k, v in values.items() if v is not None}
        clean = _check_attributes(session, trial, given)
        merged = {k: v for k, v in (home.attributes or {}).items() if k not in values}
        merged.update(clean)
        home.attributes = merged
    else:
        home.attributes = _check_attributes(session, trial, values)
    session.flush()
    return home


def _refuse_if_erased(home: Home, what: str) -> None:
    if home.erased_at is not None:
        raise Conflict(f"{home.code} was withdrawn and erased; it cannot {what}.", code="home_erased")


# --- lifecycle ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class TransitionResult:
    home: Home
    change: HomeStateChange
    warnings: tuple[str, ...]
    closed: tuple[Installation, ...]  # installations closed because the home left the pilot


def transition(
    session: Session,
    home: Home,
    to_state: str,
    *,
    actor: Actor = "cli",
    at: dt.datetime | None = None,
    note: str | None = None,
    listening: bool = True,
) -> TransitionResult:
    """Move a home to ``to_state`` at ``at`` (default now), recording time, author and note.

    ``listening`` matters on a pause: whether the devices keep listening (their time still counts
    as monitored). Leaving the pilot (withdrawn, declined) closes open installations at ``at``.
    Refusals: 409 ``illegal_transition``, ``consent_missing``, ``no_device_installed``.
    """
    at = as_utc(at, "at") if at else utcnow()
    if home.erased_at is not None:
        raise IllegalTransition(f"{home.code} was withdrawn and erased; its state is final.")
    if at < home.state_changed_at:
        raise ValidationFailed(
            f"{home.code} last changed state at {when(home.state_changed_at)}; a new step cannot be "
            f"dated before it.",
            {"at": "This time is before the home's last change of state."},
        )
    refusal = lifecycle.check(
        home.code,
        home.state,
        to_state,
        has_consent=latest_consent(session, home) is not None,
        has_device=installations_service.home_has_device_at(session, home.id, at),
    )
    if refusal is not None:
        raise IllegalTransition(refusal.message, code=refusal.code)
    trial = trial_of(session, home)
    before = quota_service.quota_report(session, trial)
    closed: list[Installation] = []
    if to_state in lifecycle.ENDED:
        for inst in installations_service.open_installations(session, home.id):
            closed.append(
                installations_service.remove_installation(session, inst, removed_at=at, actor=actor)
            )
    change = HomeStateChange(
        home_id=home.id,
        from_state=home.state,
        to_state=to_state,
        at=at,
        by_id=_by_id(actor),
        note=_note(note),
        listening=bool(listening) if to_state == HomeState.paused else True,
    )
    session.add(change)
    home.state = to_state
    home.state_changed_at = at
    session.flush()
    after = quota_service.quota_report(session, trial)
    warnings = tuple(
        f"Quota target '{s.target.label}' now has {s.count} home{'s' if s.count != 1 else ''}, "
        f"below its minimum of {s.target.min_count}."
        for s in quota.newly_short(before, after)
    )
    return TransitionResult(home, change, warnings, tuple(closed))


# --- consent and personal data ------------------------------------------------------------------


def record_consent(
    session: Session,
    home: Home,
    *,
    form_version: str,
    consented_on: dt.date,
    staff_may_listen: bool = True,
    retention_days: int = 90,
    actor: Actor = "cli",
    mark_consented: bool = False,
    at: dt.datetime | None = None,
    today: dt.date | None = None,
) -> Consent:
    """Record the household's signed consent; ``mark_consented`` also moves a screened home on.

    The move is dated ``at``, or by default from the signing date (local midnight) but never before
    the home's last change of state.
    """
    _refuse_if_erased(home, "record a consent")
    errors: dict[str, str] = {}
    form_version = (form_version or "").strip()
    if not 1 <= len(form_version) <= 40:
        errors["form_version"] = "Give the consent form's version (1 to 40 characters)."
    today = today or utcnow().date()
    if consented_on > today + dt.timedelta(days=1):
        errors["consented_on"] = "The consent date cannot be in the future."
    if not 1 <= int(retention_days) <= 3650:
        errors["retention_days"] = "Keep clips for 1 to 3650 days."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    consent = Consent(
        home_id=home.id,
        form_version=form_version,
        consented_on=consented_on,
        staff_may_listen=bool(staff_may_listen),
        retention_days=int(retention_days),
        recorded_by_id=_by_id(actor),
        recorded_at=utcnow(),
    )
    session.add(consent)
    session.flush()
    audit.record(
        session,
        actor,
        "consent.record",
        "home",
        home.id,
        {
            "code": home.code,
            "form_version": form_version,
            "retention_days": int(retention_days),
            "staff_may_listen": bool(staff_may_listen),
        },
    )
    if mark_consented:
        if at is None:
            # The home is consented from the day the form was signed (local midnight), unless its
            # last change of state came later.
            tz = zoneinfo.ZoneInfo(trial_of(session, home).timezone)
            signed = dt.datetime.combine(consented_on, dt.time(0), tzinfo=tz).astimezone(dt.UTC)
            at = min(max(signed, home.state_changed_at), max(utcnow(), home.state_changed_at))
        transition(
            session,
            home,
            HomeState.consented,
            actor=actor,
            at=at,
            note=f"Consent form {form_version} signed {consented_on.isoformat()}.",
        )
    return consent


def check_contact(values: Mapping[str, str]) -> dict[str, str]:
    clean = {f: (values.get(f) or "").strip() for f in CONTACT_FIELDS}
    errors: dict[str, str] = {}
    limits = {"names": 300, "address": 2000, "phone": 60, "email": 254, "access_notes": 2000}
    for f, n in limits.items():
        if len(clean[f]) > n:
            errors[f] = f"At most {n} characters."
    if clean["email"] and not EMAIL_PATTERN.match(clean["email"]):
        errors["email"] = "This does not look like an e-mail address."
    if clean["phone"] and not PHONE_PATTERN.match(clean["phone"]):
        errors["phone"] = "Use digits, spaces and + ( ) - . / only."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    return clean


def set_contact(session: Session, home: Home, *, actor: Actor = "cli", **values: str) -> HomeContact:
    """Create or replace the household's contact details (personal data; the change is audited)."""
    _refuse_if_erased(home, "take new contact details")
    unknown = set(values) - set(CONTACT_FIELDS)
    if unknown:
        raise ValidationFailed(f"Unknown contact field(s): {', '.join(sorted(unknown))}.")
    clean = check_contact(values)
    contact = session.scalar(select(HomeContact).where(HomeContact.home_id == home.id))
    changed: list[str]
    if contact is None:
        contact = HomeContact(home_id=home.id, **clean)
        session.add(contact)
        changed = [f for f in CONTACT_FIELDS if clean[f]]
    else:
        changed = [f for f in CONTACT_FIELDS if getattr(contact, f) != clean[f]]
        for f in CONTACT_FIELDS:
            setattr(contact, f, clean[f])
    contact.updated_at = utcnow()
    session.flush()
    # The trail names the fields, never their values.
    audit.record(session, actor, "personal.update", "home", home.id, {"code": home.code, "fields": changed})
    return contact


def view_contact(session: Session, home: Home, *, actor: Actor, via: str) -> HomeContact | None:
    """The household's contact details for someone allowed to see them; every view is audited."""
    contact = session.scalar(select(HomeContact).where(HomeContact.home_id == home.id))
    audit.record(
        session,
        actor,
        "personal.view",
        "home",
        home.id,
        {"code": home.code, "via": via, "present": contact is not None},
    )
    return contact


def has_contact(session: Session, home: Home) -> bool:
    return session.scalar(select(HomeContact.id).where(HomeContact.home_id == home.id)) is not None


# --- installing a device: the household's side ----------------------------------------------


def install_device(
    session: Session,
    *,
    home: Home,
    device: DeviceRef,
    room: str,
    installed_at: dt.datetime,
    actor: Actor = "cli",
    move: bool = False,
) -> InstallResult:
    """Put a device in a home's room from ``installed_at``; ``move`` first closes its open installation.

    The home must be able to receive it (consent on record, a state that takes devices); a
    consented home becomes installed. Refusals: 409 ``consent_missing``, ``illegal_transition``,
    ``device_installed_elsewhere``, ``installation_overlap``; 422 for a bad room or time.
    """
    installed_at = as_utc(installed_at, "installed_at")
    room = installations_service.check_room(room)
    _refuse_if_erased(home, "receive a device")
    installations_service.check_pairing(home, device)
    if latest_consent(session, home) is None:
        raise IllegalTransition(
            f"{home.code} has no consent on record; record the household's signed "
            "consent before installing a device.",
            code="consent_missing",
        )
    if home.state not in lifecycle.MAY_INSTALL:
        raise IllegalTransition(
            f"{home.code} is {home.state}; devices go only into consented, installed, active or paused homes."
        )
    inst, closed = installations_service.open_installation(
        session, home=home, device=device, room=room, installed_at=installed_at, actor=actor, move=move
    )
    if home.state == HomeState.consented:
        transition(
            session,
            home,
            HomeState.installed,
            actor=actor,
            at=max(installed_at, home.state_changed_at),
            note=f"Device {device.serial} installed ({room.replace('_', ' ')}).",
        )
    return InstallResult(inst, closed, installations_service.reattribute_alerts(session, device.id))


def move_device(
    session: Session, *, device: DeviceRef, to_home: Home, room: str, at: dt.datetime, actor: Actor = "cli"
) -> InstallResult:
    """Close the device's open installation at ``at`` and open one in ``to_home``."""
    return install_device(
        session, home=to_home, device=device, room=room, installed_at=at, actor=actor, move=True
    )


def home_count(session: Session, trial: Trial) -> int:
    return session.scalar(select(func.count(Home.id)).where(Home.trial_id == trial.id)) or 0
