"""Devices: registration, heartbeats into listening segments, alert ingest and attribution."""

from __future__ import annotations

import datetime as dt
import json
import logging
import random
from dataclasses import dataclass
from typing import Any

from pydantic import ValidationError
from sqlalchemy import bindparam, case, func, insert, select, update
from sqlalchemy.dialects import postgresql as postgresql_dialect
from sqlalchemy.dialects import sqlite as sqlite_dialect
from sqlalchemy.engine import Connection
from sqlalchemy.orm import Session
from sqlalchemy.orm.attributes import set_committed_value

from server import audit
from server.auth.models import User
from server.db import utcnow
from server.devices import audio
from server.devices.clipstore import ClipStore, SpooledUpload
from server.devices.models import Alert, Clip, Device, FirmwareChange, ListeningSegment
from server.devices.schemas import AlertMeta, EventIdOnly, HeartbeatIn
from server.errors import (
    AppError,
    ClipDigestMismatch,
    Conflict,
    DeviceRevoked,
    EventIdConflict,
    InvalidMeta,
    InvalidRequest,
    InvalidToken,
    NotFound,
    UnknownSoundClass,
    UnreadableAudio,
    UnsupportedAudio,
    UnsupportedChannels,
    ValidationFailed,
)
from server.households.models import Home
from server.installations.models import Installation
from server.settings import Settings
from server.tokens import DEVICE_PREFIX, new_token, token_digest
from server.trials.models import Trial

log = logging.getLogger(__name__)


class ClipOfErasedHome(AppError):
    """A clip detected while its device was installed in a home that has since been erased.

    Final for the device (410: the home is gone for good); nothing of the upload is stored.
    """

    code, status = "home_erased", 410


# --- registration ---------------------------------------------------------------------------


def register_device(
    session: Session,
    *,
    serial: str,
    trial: Trial,
    hardware_model: str = "unknown",
    actor: User | str = "cli",
    heartbeat_interval_s: int = 60,
) -> tuple[Device, str]:
    """Create a device and its bearer token. The token is returned once and stored only hashed."""
    serial = serial.strip()
    if not serial or len(serial) > 64:
        raise ValidationFailed("A serial is 1 to 64 characters.", {"serial": "1 to 64 characters."})
    if (
        session.scalar(
            select(Device.id).where(Device.serial == serial).execution_options(trialhouse_all_trials=True)
        )
        is not None
    ):  # unique in every trial
        raise Conflict(f"A device with serial {serial} is already registered.", code="device_exists")
    token = new_token(DEVICE_PREFIX)
    device = Device(
        serial=serial,
        trial_id=trial.id,
        hardware_model=hardware_model or "unknown",
        token_hash=token_digest(token),
        heartbeat_interval_s=heartbeat_interval_s,
    )
    session.add(device)
    session.flush()
    audit.record(
        session, actor, "device.register", "device", device.id, {"serial": serial, "trial": trial.code}
    )
    return device, token


def revoke_device(session: Session, serial: str, actor: User | str = "cli") -> Device:
    device = get_device(session, serial)
    if not device.revoked:
        device.revoked = True
        device.revoked_at = utcnow()
        audit.record(session, actor, "device.revoke", "device", device.id, {"serial": serial})
    return device


def get_device(session: Session, serial: str) -> Device:
    device = session.scalar(select(Device).where(Device.serial == serial))
    if device is None:
        raise NotFound(f"No device has serial {serial}.", code="unknown_device")
    return device


def list_devices(session: Session) -> list[Device]:
    return list(session.scalars(select(Device).order_by(Device.serial)))


# Statements on the device hot paths are built once: building a statement and its cache key on
# every request costs more CPU than running it. Parameters are bound at execution. The writes are
# table-level (Core) statements run on the session's connection: the ORM's bulk-update machinery
# would cost more than the statements themselves, and no loaded object needs to follow them.
_DEVICE_BY_TOKEN = select(Device).where(Device.token_hash == bindparam("token_hash_v"))
_device, _segment = Device.__table__.c, ListeningSegment.__table__.c
_TOUCH_DEVICE = (
    update(Device.__table__)
    .where(_device.id == bindparam("device_id_v"))
    .values(
        last_seen_at=bindparam("seen_v"), firmware=bindparam("firmware_v"), clock_skew_s=bindparam("skew_v")
    )
)
_EXTEND_SEGMENT = (
    update(ListeningSegment.__table__)
    .where(
        _segment.device_id == bindparam("device_id_v"),
        _segment.is_open.is_(True),
        _segment.ended_at <= bindparam("now_v"),
        _segment.ended_at >= bindparam("since_v"),
    )
    .values(ended_at=bindparam("now_v"), heartbeats=_segment.heartbeats + 1)
)
_CLOSE_SEGMENT = (
    update(ListeningSegment.__table__)
    .where(_segment.device_id == bindparam("device_id_v"), _segment.is_open.is_(True))
    .values(is_open=False)
)
_FIRMWARE_CHANGED = insert(FirmwareChange.__table__)


def authenticate_device(session: Session, token: str) -> Device:
    device = session.scalar(_DEVICE_BY_TOKEN, {"token_hash_v": token_digest(token)})
    if device is None:
        raise InvalidToken()
    if device.revoked:
        raise DeviceRevoked(f"Device {device.serial} was revoked; it can no longer send data.")
    return device


# --- time checks ----------------------------------------------------------------------------


def _check_time_window(
    value: dt.datetime,
    now: dt.datetime,
    settings: Settings,
    field: str,
    error: type[InvalidMeta] | type[InvalidRequest],
) -> None:
    earliest = now - dt.timedelta(days=settings.max_past_days)
    latest = now + dt.timedelta(hours=settings.max_future_hours)
    if not earliest <= value <= latest:
        raise error(
            f"'{field}' is {value.isoformat()}, outside the accepted window of "
            f"{settings.max_past_days} days before to {settings.max_future_hours} hours after "
            f"the server's clock ({now.isoformat()}).",
            field=field,
        )


# --- heartbeats -----------------------------------------------------------------------------


def record_heartbeat(
    session: Session,
    *,
    device: Device,
    beat: HeartbeatIn,
    settings: Settings,
    now: dt.datetime | None = None,
    rng: random.Random | None = None,
) -> tuple[dt.datetime, int]:
    """Extend or close the device's open listening segment; return (received_at, next interval s).

    Monitored time is server time: a beat within gap tolerance (``heartbeat_gap_factor`` x the
    device's interval) of the open segment's end extends it to now; a longer gap starts a new
    segment at now; ``listening: false`` closes the open segment at its last listening beat.
    """
    now = now or utcnow()
    # invalid_request, like every other heartbeat body error.
    _check_time_window(beat.sent_at, now, settings, "sent_at", InvalidRequest)
    # The device row is written first, unconditionally: on PostgreSQL that UPDATE takes the row lock
    # that serialises one device's beats (SQLite serialises all writers), so at most one segment is
    # ever open. The object in the session is given the same values without a second UPDATE.
    seen = {
        "last_seen_at": now,
        "firmware": beat.firmware,
        "clock_skew_s": round((beat.sent_at - now).total_seconds(), 3),
    }
    conn = session.connection()
    conn.execute(
        _TOUCH_DEVICE,
        {
            "device_id_v": device.id,
            "seen_v": now,
            "firmware_v": beat.firmware,
            "skew_v": seen["clock_skew_s"],
        },
    )
    if beat.firmware != device.firmware:
        # Monitored time from now on is credited to this firmware (see analytics).
        conn.execute(_FIRMWARE_CHANGED, {"device_id": device.id, "at": now, "firmware": beat.firmware})
    for key, value in seen.items():
        set_committed_value(device, key, value)
    # Segments change through UPDATE statements (the usual beat extends the open one in a single
    # statement); ListeningSegment objects already loaded in this session are not refreshed.
    gap = dt.timedelta(seconds=device.heartbeat_interval_s * settings.heartbeat_gap_factor)
    if beat.listening:
        extended = conn.execute(
            _EXTEND_SEGMENT, {"device_id_v": device.id, "now_v": now, "since_v": now - gap}
        ).rowcount
        if not extended:
            conn.execute(_CLOSE_SEGMENT, {"device_id_v": device.id})
            session.add(ListeningSegment(device_id=device.id, started_at=now, ended_at=now, is_open=True))
    else:
        conn.execute(_CLOSE_SEGMENT, {"device_id_v": device.id})
    session.flush()
    if device.listening_check_from is not None:
        settle_listening(session, device, now)
    r = rng or random
    jitter = settings.heartbeat_jitter
    interval = device.heartbeat_interval_s * (1.0 + r.uniform(-jitter, jitter))
    return now, max(1, round(interval))


def settle_listening(session: Session, device: Device, now: dt.datetime) -> int:
    """Mark the device's recent alerts that now lie inside a listening segment; return how many.

    Runs after a heartbeat of a device that has alerts detected since ``check_from`` whose
    listening was not yet known. An alert left unmarked is not lost: analytics checks the
    segments itself for every alert not marked. The mark is a cache, never a verdict.
    """
    device_id, check_from = device.id, device.listening_check_from
    if check_from is None:
        return 0
    # One day of slack covers clock-skew corrections; an alert outside it simply stays unmarked.
    rows = session.execute(
        select(Alert.id, Alert.detected_at, Alert.clock_skew_s).where(
            Alert.device_id == device_id,
            Alert.within_listening.is_(None),
            Alert.detected_at >= check_from - dt.timedelta(days=1),
        )
    ).all()
    inside, later = [], []
    for alert_id, detected_at, skew in rows:
        at = detected_at - dt.timedelta(seconds=skew) if skew else detected_at
        if at < check_from:
            continue
        end = session.scalar(_SEGMENT_END_AT, {"device_id_v": device_id, "at_v": at})
        if end is not None and end >= at:
            inside.append(alert_id)
        elif at > now:  # detected "after" this heartbeat: a later one may still cover it
            later.append(at)
    if inside:
        session.execute(
            update(Alert)
            .where(Alert.id.in_(inside))
            .values(within_listening=True)
            .execution_options(synchronize_session=False)
        )
    # Compare-and-set: an alert that arrived meanwhile moved the mark, and keeps it.
    mark = min(later) if later else None
    session.execute(
        update(Device)
        .where(Device.id == device_id, Device.listening_check_from == check_from)
        .values(listening_check_from=mark)
        .execution_options(synchronize_session=False)
    )
    set_committed_value(device, "listening_check_from", mark)
    return len(inside)


def listening_seconds(
    session: Session, device_ids: list[int], since: dt.datetime, until: dt.datetime
) -> dict[int, float]:
    """Seconds of listening per device inside [since, until], from stored segments."""
    if not device_ids:
        return {}
    rows = session.execute(
        select(ListeningSegment.device_id, ListeningSegment.started_at, ListeningSegment.ended_at).where(
            ListeningSegment.device_id.in_(device_ids),
            ListeningSegment.ended_at > since,
            ListeningSegment.started_at < until,
        )
    )
    out: dict[int, float] = dict.fromkeys(device_ids, 0.0)
    for dev_id, start, end in rows:
        s, e = max(start, since), min(end, until)
        if e > s:
            out[dev_id] += (e - s).total_seconds()
    return out


# --- alerts ---------------------------------------------------------------------------------

_UPLOAD_FACTS = select(
    select(Alert.id)
    .where(Alert.device_id == bindparam("device_id_v"), Alert.event_id == bindparam("event_id_v"))
    .scalar_subquery()
    .label("alert_id"),
    select(Trial.sound_classes).where(Trial.id == bindparam("trial_id_v")).scalar_subquery().label("classes"),
    select(Clip.id)
    .where(Clip.sha256 == bindparam("sha_v"), Clip.erased_at.is_(None))
    .scalar_subquery()
    .label("clip_id"),
)
# As installations.service.installation_at, columns only, with the end of the device's last segment
# started by then.
_PLACED_AT = (
    select(Installation.id, Installation.home_id, Home.erased_at.label("home_erased_at"))
    .join(Home, Home.id == Installation.home_id)
    .where(
        Installation.device_id == bindparam("device_id_v"),
        Installation.installed_at <= bindparam("at_v"),
        (Installation.removed_at.is_(None)) | (Installation.removed_at > bindparam("at_v")),
    )
    .order_by(Installation.installed_at.desc())
    .limit(1)
    .subquery("placed")
)
_SEGMENT_END_AT = (
    select(ListeningSegment.ended_at)
    .where(
        ListeningSegment.device_id == bindparam("device_id_v"),
        ListeningSegment.started_at <= bindparam("at_v"),
    )
    .order_by(ListeningSegment.started_at.desc())
    .limit(1)
)
_PLACEMENT = select(
    select(_PLACED_AT.c.id).scalar_subquery().label("installation_id"),
    select(_PLACED_AT.c.home_id).scalar_subquery().label("home_id"),
    select(_PLACED_AT.c.home_erased_at).scalar_subquery().label("home_erased_at"),
    _SEGMENT_END_AT.scalar_subquery().label("segment_end"),
)
_NOTE_LISTENING_CHECK = (
    update(Device.__table__)
    .where(_device.id == bindparam("device_id_v"))
    .values(
        listening_check_from=case(
            (
                _device.listening_check_from.is_(None) | (_device.listening_check_from > bindparam("at_v")),
                bindparam("at_v"),
            ),
            else_=_device.listening_check_from,
        )
    )
)


@dataclass(frozen=True)
class IngestResult:
    alert_id: int
    clip_id: int
    duplicate: bool


def _parse_meta(raw: bytes) -> tuple[str, dict[str, object]]:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidMeta("The 'meta' part is not UTF-8 text.") from exc
    try:
        data = json.loads(text, parse_constant=_reject_constant)
    except (ValueError, RecursionError) as exc:  # RecursionError: nested too deep to parse
        raise InvalidMeta(f"The 'meta' part is not valid JSON: {exc}.") from exc
    if not isinstance(data, dict):
        raise InvalidMeta("The 'meta' part must be a JSON object.")
    try:
        ev = EventIdOnly.model_validate(data)
    except ValidationError as exc:
        raise InvalidMeta(_first_error(exc), field="event_id") from exc
    return ev.event_id, data


def _reject_constant(name: str) -> object:
    raise ValueError(f"{name} is not a JSON number")


def _first_error(exc: ValidationError) -> str:
    err = exc.errors()[0]
    loc = ".".join(str(p) for p in err.get("loc", ()))
    return f"'meta' field '{loc}': {err.get('msg', 'invalid')}." if loc else f"'meta': {err.get('msg')}."


def find_alert_by_event(session: Session, device_id: int, event_id: str) -> Alert | None:
    return session.scalar(select(Alert).where(Alert.device_id == device_id, Alert.event_id == event_id))


def _duplicate_or_conflict(existing: Alert, sha: str) -> IngestResult:
    if existing.clip.sha256 == sha:
        return IngestResult(existing.id, existing.clip_id, True)
    raise EventIdConflict(
        f"event_id '{existing.event_id}' was already used by this device for a different clip "
        f"(alert {existing.id}); give each detection its own event_id."
    )


def ingest_alert(
    session: Session,
    *,
    store: ClipStore,
    settings: Settings,
    device: Device,
    meta_raw: bytes,
    upload: SpooledUpload,
    now: dt.datetime | None = None,
) -> IngestResult:
    """Check and store one alert clip. Bytes are stored as received, before the row commits."""
    now = now or utcnow()
    event_id, data = _parse_meta(meta_raw)
    sha = upload.sha256
    # What needs no database comes before the first query: on SQLite that query takes the write
    # lock for the rest of the transaction, and the fsync and the full decode would hold it for
    # every other device. An audio error is kept and raised in its documented place below.
    upload.finish()
    info: audio.ClipInfo | None = None
    audio_error: AppError | None = None
    try:
        info = audio.probe(
            upload.path,
            min_rate_hz=settings.min_rate_hz,
            max_rate_hz=settings.max_rate_hz,
            min_duration_s=settings.min_clip_s,
            max_duration_s=settings.max_clip_s,
        )
    except (UnreadableAudio, UnsupportedAudio, UnsupportedChannels) as exc:
        audio_error = exc
    # One round trip for the three look-ups every upload needs (the first takes SQLite's write lock).
    conn = session.connection()
    facts = conn.execute(
        _UPLOAD_FACTS,
        {"device_id_v": device.id, "event_id_v": event_id, "trial_id_v": device.trial_id, "sha_v": sha},
    ).one()
    if facts.alert_id is not None:
        existing = find_alert_by_event(session, device.id, event_id)
        assert existing is not None
        return _duplicate_or_conflict(existing, sha)
    try:
        meta = AlertMeta.model_validate_json(meta_raw)
    except ValidationError as exc:
        raise InvalidMeta(_first_error(exc)) from exc
    classes: list[str] = facts.classes or []
    if meta.sound_class not in classes:
        raise UnknownSoundClass(
            f"sound_class '{meta.sound_class}' is not one of this trial's classes: {', '.join(classes)}.",
            field="sound_class",
        )
    _check_time_window(meta.detected_at, now, settings, "detected_at", InvalidMeta)
    if meta.clip_sha256 is not None and meta.clip_sha256 != sha:
        raise ClipDigestMismatch(f"clip_sha256 says {meta.clip_sha256} but the clip's SHA-256 is {sha}.")
    if audio_error is not None:
        raise audio_error
    assert info is not None
    if meta.clip_offset_s > info.duration_s:
        raise InvalidMeta(
            f"clip_offset_s is {meta.clip_offset_s} s but the clip lasts only {info.duration_s:.3f} s.",
            field="clip_offset_s",
        )
    size = upload.size
    skew = device.clock_skew_s if device.clock_skew_s and abs(device.clock_skew_s) >= 1.0 else None
    at = meta.detected_at - dt.timedelta(seconds=skew) if skew else meta.detected_at  # Alert.effective_at
    placed = conn.execute(_PLACEMENT, {"device_id_v": device.id, "at_v": at}).one()
    if placed.home_erased_at is not None:
        # Heard inside a home that was erased (a device that buffered while offline): nothing of it
        # is kept. The check comes before the store, so not a byte reaches it; the caller's spool
        # is deleted on the way out.
        log.info("clip from device %s dropped: its home was erased", device.serial)
        raise ClipOfErasedHome(
            f"This clip was detected on {at:%Y-%m-%d %H:%M} UTC in a home that has since been withdrawn "
            "and erased; it is not stored. Do not send it again."
        )
    key = store.put_file(upload.path, sha)  # durable before the row commits
    within = placed.segment_end is not None and placed.segment_end >= at
    if not within:
        # Usually the detection came after the last heartbeat: the next one decides.
        conn.execute(_NOTE_LISTENING_CHECK, {"device_id_v": device.id, "at_v": at})
    # Rows go in as plain INSERT ... ON CONFLICT DO NOTHING statements: a simultaneous upload that
    # won a unique constraint shows as no row returned, with no savepoint to roll back to.
    dialect = conn.dialect.name
    clip_id = _clip_for(conn, facts.clip_id, sha, key, info, size)
    alert_id = conn.scalar(
        _INSERT_ALERT[dialect],
        {
            "device_id": device.id,
            "trial_id": device.trial_id,
            "event_id": event_id,
            "sound_class": meta.sound_class,
            "score": meta.score,
            "detected_at": meta.detected_at,
            "detected_at_text": str(data.get("detected_at"))[:64],
            "clock_skew_s": skew,
            "received_at": now,
            "firmware": meta.firmware,
            "clip_id": clip_id,
            "clip_offset_s": meta.clip_offset_s,
            "installation_id": placed.installation_id,
            "home_id": placed.home_id,
            "within_listening": True if within else None,
        },
    )
    if alert_id is None:
        # A simultaneous upload stored this device's event_id first: a resend, or a conflict.
        existing = find_alert_by_event(session, device.id, event_id)
        assert existing is not None
        return _duplicate_or_conflict(existing, sha)
    return IngestResult(alert_id, clip_id, False)


def _insert_ignoring_conflict(table: Any, columns: list[str], where: Any = None) -> dict[str, Any]:
    """Per dialect: INSERT of one row that does nothing on a unique conflict on `columns` (of a
    partial unique index when `where` is given), returning the new id (no row when it did nothing)."""
    return {
        name: module.insert(table)
        .on_conflict_do_nothing(index_elements=columns, index_where=where)
        .returning(table.c.id)
        for name, module in (("sqlite", sqlite_dialect), ("postgresql", postgresql_dialect))
    }


_INSERT_ALERT = _insert_ignoring_conflict(Alert.__table__, ["device_id", "event_id"])
# Only live clip rows are unique by SHA-256 (ix_clip_sha256_live): an erased row keeps its digest.
_INSERT_CLIP = _insert_ignoring_conflict(Clip.__table__, ["sha256"], Clip.__table__.c.erased_at.is_(None))
_LIVE_CLIP_BY_SHA = select(Clip.id).where(Clip.sha256 == bindparam("sha_v"), Clip.erased_at.is_(None))


def _clip_for(
    conn: Connection, clip_id: int | None, sha: str, key: str, info: audio.ClipInfo, size: int
) -> int:
    """The id of the live clip row for these bytes: the stored one, or a new one.

    An erased row is never brought back: its alerts stay erased, and identical bytes sent later
    get a row of their own.
    """
    for _ in range(3):  # a row found may be erased before it is used, or a new one won the insert
        if clip_id is None:
            clip_id = conn.scalar(
                _INSERT_CLIP[conn.dialect.name],
                {
                    "sha256": sha,
                    "storage_key": key,
                    "format": info.format,
                    "subtype": info.subtype,
                    "sample_rate_hz": info.sample_rate_hz,
                    "channels": info.channels,
                    "frames": info.frames,
                    "duration_s": info.duration_s,
                    "peak_dbfs": info.peak_dbfs,
                    "rms_dbfs": info.rms_dbfs,
                    "clipped_fraction": info.clipped_fraction,
                    "size_bytes": size,
                },
            )
            if clip_id is not None:
                return clip_id
        # The bytes are stored already (found before, or another device's upload just won the insert).
        clip_id = conn.scalar(_LIVE_CLIP_BY_SHA, {"sha_v": sha})
        if clip_id is not None:
            return int(clip_id)
    raise RuntimeError(f"no live clip row for {sha} after three attempts")


def list_alerts(
    session: Session,
    *,
    limit: int = 200,
    offset: int = 0,
    device_id: int | None = None,
    trial_id: int | None = None,
) -> list[Alert]:
    q = select(Alert).order_by(Alert.received_at.desc(), Alert.id.desc())
    if device_id is not None:
        q = q.where(Alert.device_id == device_id)
    if trial_id is not None:
        q = q.where(Alert.trial_id == trial_id)
    return list(session.scalars(q.limit(limit).offset(offset)))


def get_alert(session: Session, alert_id: int) -> Alert:
    alert = session.get(Alert, alert_id)
    if alert is None:
        raise NotFound(f"No alert has id {alert_id}.", code="unknown_alert")
    return alert


def count_alerts(session: Session) -> int:
    return session.scalar(select(func.count(Alert.id))) or 0


def mark_clip_erased(session: Session, clip: Clip, reason: str, at: dt.datetime | None = None) -> None:
    """Mark a clip row erased (its file already removed). The row is never brought back: identical
    bytes sent later get a new row (see ``_clip_for``)."""
    at = at or utcnow()
    session.execute(
        update(Clip)
        .where(Clip.id == clip.id)
        .values(erased_at=at, erased_reason=reason)
        .execution_options(synchronize_session=False)
    )
    set_committed_value(clip, "erased_at", at)
    set_committed_value(clip, "erased_reason", reason)
