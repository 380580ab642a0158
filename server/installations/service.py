"""Installations: put a device in a home's room, move it, remove it, correct the dates; attribute
alerts to the installation active at their detection time.

A device is in at most one home at a time, in its own trial. The household's rules for receiving a
device (consent, state) and the lifecycle step it causes live in server.households, which calls
here. Imports neither server.devices nor server.households. Services flush and never commit.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from sqlalchemy import Float, Integer, bindparam, column, select, table, update
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.db import UTCDateTime
from server.errors import Conflict, NotFound, ValidationFailed
from server.installations.models import ROOMS, DeviceRef, HomeRef, Installation

Actor = User | str


def as_utc(value: dt.datetime, field: str) -> dt.datetime:
    """An aware time in UTC; a naive one is refused (422 naming ``field``)."""
    if value.tzinfo is None:
        raise ValidationFailed(f"'{field}' needs a time zone.", {field: "Give the time with its time zone."})
    return value.astimezone(dt.UTC)


def when(value: dt.datetime | None) -> str:
    return value.strftime("%Y-%m-%d %H:%M UTC") if value else "now"


@dataclass(frozen=True)
class InstallResult:
    installation: Installation
    closed: Installation | None  # the device's previous installation, closed by a move
    reattributed: int  # alerts whose home or installation changed


@dataclass(frozen=True)
class CorrectionResult:
    installation: Installation
    reattributed: int


# --- look-ups -----------------------------------------------------------------------------------


def get_installation(session: Session, installation_id: int) -> Installation:
    inst = session.get(Installation, installation_id)
    if inst is None:
        raise NotFound(f"No installation has id {installation_id}.", code="unknown_installation")
    return inst


def list_installations(
    session: Session, *, home: HomeRef | None = None, device: DeviceRef | None = None
) -> list[Installation]:
    q = select(Installation).order_by(Installation.installed_at.desc(), Installation.id.desc())
    if home is not None:
        q = q.where(Installation.home_id == home.id)
    if device is not None:
        q = q.where(Installation.device_id == device.id)
    return list(session.scalars(q))


def current_installation(session: Session, device: DeviceRef) -> Installation | None:
    return session.scalar(
        select(Installation).where(Installation.device_id == device.id, Installation.removed_at.is_(None))
    )


def installation_at(session: Session, device_id: int, at: dt.datetime) -> Installation | None:
    """The installation of the device active at ``at`` (from inclusive, to exclusive)."""
    return session.scalar(
        select(Installation)
        .where(
            Installation.device_id == device_id,
            Installation.installed_at <= at,
            Installation.removed_at.is_(None) | (Installation.removed_at > at),
        )
        .order_by(Installation.installed_at.desc())
        .limit(1)
    )


def home_has_device_at(session: Session, home_id: int, at: dt.datetime) -> bool:
    return (
        session.scalar(
            select(Installation.id)
            .where(
                Installation.home_id == home_id,
                Installation.installed_at <= at,
                Installation.removed_at.is_(None) | (Installation.removed_at > at),
            )
            .limit(1)
        )
        is not None
    )


def home_had_device_during(session: Session, home_id: int, start: dt.datetime, end: dt.datetime) -> bool:
    """Whether any installation of the home overlaps [start, end)."""
    return (
        session.scalar(
            select(Installation.id)
            .where(
                Installation.home_id == home_id,
                Installation.installed_at < end,
                Installation.removed_at.is_(None) | (Installation.removed_at > start),
            )
            .limit(1)
        )
        is not None
    )


def open_installations(session: Session, home_id: int) -> list[Installation]:
    return list(
        session.scalars(
            select(Installation).where(Installation.home_id == home_id, Installation.removed_at.is_(None))
        )
    )


# --- rules --------------------------------------------------------------------------------------


def check_room(room: str) -> str:
    room = (room or "").strip().lower().replace(" ", "_")
    if room not in ROOMS:
        raise ValidationFailed(
            f"The room is one of: {', '.join(r.replace('_', ' ') for r in ROOMS)}.",
            {"room": "Pick a room from the list."},
        )
    return room


def check_pairing(home: HomeRef, device: DeviceRef) -> None:
    """A device goes only into a home of its own trial, and never once revoked."""
    if device.trial_id != home.trial_id:
        raise Conflict(
            f"Device {device.serial} belongs to another trial than {home.code}.", code="device_other_trial"
        )
    if device.revoked:
        raise Conflict(f"Device {device.serial} was revoked; it cannot be installed.", code="revoked_device")


def _check_no_overlap(
    session: Session,
    device: DeviceRef,
    start: dt.datetime,
    end: dt.datetime | None,
    exclude_id: int | None = None,
) -> None:
    for other in list_installations(session, device=device):
        if other.id == exclude_id:
            continue
        # Half-open spans [start, end) share an instant; None is still open.
        if (other.removed_at is None or start < other.removed_at) and (
            end is None or other.installed_at < end
        ):
            until = f"until {when(other.removed_at)}" if other.removed_at else "with no end yet"
            raise Conflict(
                f"Device {device.serial} was in {other.home.code} ({other.room.replace('_', ' ')}) from "
                f"{when(other.installed_at)} {until}; a device can be in only one home at a time.",
                code="installation_overlap",
            )


# --- install, move, remove, correct -------------------------------------------------------------


def open_installation(
    session: Session,
    *,
    home: HomeRef,
    device: DeviceRef,
    room: str,
    installed_at: dt.datetime,
    actor: Actor = "cli",
    move: bool = False,
) -> tuple[Installation, Installation | None]:
    """The installation part of putting a device in a home (checked room and aware UTC time given).

    ``move`` first closes the device's open installation. Returns the new installation and the
    one closed. Alerts are not re-attributed here: the caller calls ``reattribute_alerts`` once its
    steps are done. Refusals: 409 ``device_installed_elsewhere``, ``installation_overlap``.
    """
    closed = None
    current = current_installation(session, device)
    if current is not None:
        if not move:
            raise Conflict(
                f"Device {device.serial} is installed in {current.home.code} "
                f"({current.room.replace('_', ' ')}) since {when(current.installed_at)}; "
                "remove it there first, or move it.",
                code="device_installed_elsewhere",
            )
        if installed_at <= current.installed_at:
            raise ValidationFailed(
                f"A move must happen after the device's current installation began "
                f"({when(current.installed_at)}).",
                {"installed_at": "Before the current installation began."},
            )
        closed = _close(session, current, installed_at, actor)
    _check_no_overlap(session, device, installed_at, None)
    inst = Installation(device_id=device.id, home_id=home.id, room=room, installed_at=installed_at)
    session.add(inst)
    session.flush()
    audit.record(
        session,
        actor,
        "installation.add",
        "installation",
        inst.id,
        {
            "device": device.serial,
            "home": home.code,
            "room": room,
            "installed_at": installed_at.isoformat(),
            "moved_from": closed.home.code if closed else None,
        },
    )
    return inst, closed


def _close(session: Session, inst: Installation, removed_at: dt.datetime, actor: Actor) -> Installation:
    if removed_at <= inst.installed_at:
        raise ValidationFailed(
            f"The removal must come after the installation began ({when(inst.installed_at)}).",
            {"removed_at": "Before the installation began."},
        )
    inst.removed_at = removed_at
    session.flush()
    audit.record(
        session,
        actor,
        "installation.remove",
        "installation",
        inst.id,
        {"home": inst.home.code, "removed_at": removed_at.isoformat()},
    )
    return inst


def remove_installation(
    session: Session, inst: Installation, *, removed_at: dt.datetime, actor: Actor = "cli"
) -> Installation:
    """Close an open installation at ``removed_at``; alerts after it become unassigned."""
    removed_at = as_utc(removed_at, "removed_at")
    if inst.removed_at is not None:
        raise Conflict(
            f"This installation already ended at {when(inst.removed_at)}; correct its dates instead.",
            code="installation_closed",
        )
    _close(session, inst, removed_at, actor)
    reattribute_alerts(session, inst.device_id)
    return inst


def correct_installation(
    session: Session,
    inst: Installation,
    *,
    installed_at: dt.datetime,
    removed_at: dt.datetime | None,
    room: str,
    actor: Actor = "cli",
) -> CorrectionResult:
    """Fix an installation's dates or room; the device's alerts are re-attributed (audited)."""
    installed_at = as_utc(installed_at, "installed_at")
    removed_at = as_utc(removed_at, "removed_at") if removed_at is not None else None
    room = check_room(room)
    if removed_at is not None and removed_at <= installed_at:
        raise ValidationFailed(
            "The removal must come after the installation began.",
            {"removed_at": "Must be after the installation time."},
        )
    device = inst.device
    _check_no_overlap(session, device, installed_at, removed_at, exclude_id=inst.id)
    before = {
        "installed_at": inst.installed_at.isoformat(),
        "room": inst.room,
        "removed_at": inst.removed_at.isoformat() if inst.removed_at else None,
    }
    inst.installed_at, inst.removed_at, inst.room = installed_at, removed_at, room
    session.flush()
    changed = reattribute_alerts(session, device.id)
    audit.record(
        session,
        actor,
        "installation.correct",
        "installation",
        inst.id,
        {
            "device": device.serial,
            "home": inst.home.code,
            "before": before,
            "after": {
                "installed_at": installed_at.isoformat(),
                "room": room,
                "removed_at": removed_at.isoformat() if removed_at else None,
            },
            "alerts_reattributed": changed,
        },
    )
    return CorrectionResult(inst, changed)


# --- attribution of alerts ----------------------------------------------------------------------

# The alert columns attribution reads and writes. Alerts belong to server.devices, which depends on
# this package: naming the table here, rather than importing its model, keeps that direction.
_alert = table(
    "alert",
    column("id", Integer),
    column("device_id", Integer),
    column("detected_at", UTCDateTime()),
    column("clock_skew_s", Float),
    column("installation_id", Integer),
    column("home_id", Integer),
)
_SET_PLACE = (
    update(_alert)
    .where(_alert.c.id == bindparam("alert_id_v"))
    .values(installation_id=bindparam("installation_id_v"), home_id=bindparam("home_id_v"))
)


def reattribute_alerts(session: Session, device_id: int) -> int:
    """Re-resolve home and installation of every alert of a device; return how many changed.

    Each alert goes to the installation active at its detection time corrected for the device's
    known clock skew (``Alert.effective_at``); with none it is unassigned.
    """
    session.flush()  # a table-level read does not flush by itself
    a = _alert.c
    rows = session.execute(
        select(a.id, a.detected_at, a.clock_skew_s, a.installation_id, a.home_id).where(
            a.device_id == device_id
        )
    )
    changes = []
    for alert_id, detected_at, skew_s, installation_id, home_id in rows.all():
        at = detected_at - dt.timedelta(seconds=skew_s) if skew_s else detected_at
        inst = installation_at(session, device_id, at)
        new = (inst.id, inst.home_id) if inst else (None, None)
        if (installation_id, home_id) != new:
            changes.append({"alert_id_v": alert_id, "installation_id_v": new[0], "home_id_v": new[1]})
    if changes:
        session.execute(_SET_PLACE, changes)
        # Alerts already loaded in this session must not keep their old place.
        moved = {c["alert_id_v"] for c in changes}
        for obj in list(session.identity_map.values()):
            if getattr(obj, "__tablename__", None) == "alert" and getattr(obj, "id", None) in moved:
                session.expire(obj, ["installation_id", "home_id"])
    return len(changes)
