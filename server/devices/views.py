"""Read models shared by the device pages and the staff API (one function, two front doors)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.auth.models import User
from server.db import utcnow
from server.devices import service
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, Device, ListeningSegment
from server.devices.schemas import AlertOut, DeviceOut
from server.errors import AppError, Forbidden
from server.households.models import Consent, Home
from server.installations.models import Installation
from server.roles import allowed
from server.settings import Settings
from server.trials.models import Trial

MEDIA_TYPES = {"WAV": "audio/wav", "FLAC": "audio/flac"}


def _current_installations(session: Session, device_ids: list[int]) -> dict[int, Installation]:
    if not device_ids:
        return {}
    rows = session.scalars(
        select(Installation).where(Installation.device_id.in_(device_ids), Installation.removed_at.is_(None))
    )
    return {r.device_id: r for r in rows}


def device_rows(session: Session, settings: Settings, devices: list[Device] | None = None) -> list[DeviceOut]:
    devices = service.list_devices(session) if devices is None else devices
    ids = [d.id for d in devices]
    now = utcnow()
    hours = service.listening_seconds(session, ids, now - dt.timedelta(days=7), now)
    inst = _current_installations(session, ids)
    trials = {t.id: t.code for t in session.scalars(select(Trial))}
    out = []
    for d in devices:
        i = inst.get(d.id)
        out.append(
            DeviceOut(
                id=d.id,
                serial=d.serial,
                trial=trials.get(d.trial_id, "?"),
                hardware_model=d.hardware_model,
                firmware=d.firmware,
                revoked=d.revoked,
                last_seen_at=d.last_seen_at,
                clock_skew_s=d.clock_skew_s,
                clock_skewed=d.clock_skew_s is not None and abs(d.clock_skew_s) > settings.clock_skew_flag_s,
                home=i.home.code if i else None,
                room=i.room if i else None,
                listening_hours_7d=round(hours.get(d.id, 0.0) / 3600.0, 2),
            )
        )
    return out


def device_row(session: Session, settings: Settings, device: Device) -> DeviceOut:
    return device_rows(session, settings, [device])[0]


def alert_rows(session: Session, alerts: list[Alert]) -> list[AlertOut]:
    homes = {
        h.id: h.code
        for h in session.scalars(select(Home).where(Home.id.in_({a.home_id for a in alerts if a.home_id})))
    }
    insts = {
        i.id: i.room
        for i in session.scalars(
            select(Installation).where(
                Installation.id.in_({a.installation_id for a in alerts if a.installation_id})
            )
        )
    }
    trials = {t.id: t.code for t in session.scalars(select(Trial))}
    return [
        AlertOut(
            id=a.id,
            device=a.device.serial,
            trial=trials.get(a.trial_id, "?"),
            home=homes.get(a.home_id) if a.home_id else None,
            room=insts.get(a.installation_id) if a.installation_id else None,
            event_id=a.event_id,
            sound_class=a.sound_class,
            score=a.score,
            detected_at=a.detected_at,
            received_at=a.received_at,
            firmware=a.firmware,
            clip_sha256=a.clip.sha256,
            clip_duration_s=a.clip.duration_s,
            clip_offset_s=a.clip_offset_s,
            state=a.state,
            final_label=a.final_label,
            clip_url=f"/clips/{a.id}/audio",
        )
        for a in alerts
    ]


def clip_file_for(session: Session, store: ClipStore, user: User, alert_id: int) -> tuple[Path, str]:
    """The clip file a staff member may hear, or a clear refusal (erased, private, no consent)."""
    alert = service.get_alert(session, alert_id)
    clip = alert.clip
    if clip.erased_at is not None or not store.exists(clip.storage_key):
        raise AppError(
            f"The clip of alert {alert_id} was erased ({clip.erased_reason or 'removed'}).",
            code="clip_erased",
            status=410,
        )
    if alert.private_flag and not allowed(user.role, "clips.private"):
        raise Forbidden(
            "This clip was flagged as private content; only admins may listen to it.", code="private_content"
        )
    if alert.home_id is not None:
        consent = session.scalar(
            select(Consent)
            .where(Consent.home_id == alert.home_id)
            .order_by(Consent.recorded_at.desc())
            .limit(1)
        )
        if consent is not None and not consent.staff_may_listen:
            raise Forbidden(
                "This household's consent does not allow staff to listen to its clips.",
                code="listening_not_consented",
            )
    return store.path(clip.storage_key), MEDIA_TYPES.get(clip.format, "application/octet-stream")


def recent_segments(session: Session, device_id: int, limit: int = 30) -> list[dict[str, Any]]:
    rows = session.scalars(
        select(ListeningSegment)
        .where(ListeningSegment.device_id == device_id)
        .order_by(ListeningSegment.started_at.desc())
        .limit(limit)
    )
    return [
        {
            "started_at": s.started_at,
            "ended_at": s.ended_at,
            "open": s.is_open,
            "hours": (s.ended_at - s.started_at).total_seconds() / 3600.0,
        }
        for s in rows
    ]


def device_installations(session: Session, device_id: int) -> list[dict[str, Any]]:
    rows = session.scalars(
        select(Installation)
        .where(Installation.device_id == device_id)
        .order_by(Installation.installed_at.desc())
    )
    return [
        {"home": i.home.code, "room": i.room, "installed_at": i.installed_at, "removed_at": i.removed_at}
        for i in rows
    ]
