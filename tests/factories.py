"""Plain factory functions for tests: each takes a session and overrides, and flushes."""

from __future__ import annotations

import datetime as dt
import io
import itertools
from typing import Any

import numpy as np
import soundfile as sf
from sqlalchemy.orm import Session

from server.auth import service as auth_service
from server.auth.models import User
from server.devices import service as devices_service
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, Device
from server.households.models import Home
from server.installations.models import Installation
from server.settings import Settings
from server.trials import service as trials_service
from server.trials.models import Trial

_seq = itertools.count(1)

PASSWORD = "correct horse battery"


def _n() -> int:
    return next(_seq)


def make_trial(session: Session, **kw: Any) -> Trial:
    n = _n()
    args: dict[str, Any] = {
        "code": f"T{n:04d}",
        "name": f"Test trial {n}",
        "starts_on": dt.date(2026, 1, 1),
        "sound_classes": ["smoke_alarm", "baby_cry", "glass_break"],
    }
    args.update(kw)
    return trials_service.create_trial(session, **args)


def make_user(
    session: Session, *, role: str = "coordinator", password: str = PASSWORD, **kw: Any
) -> tuple[User, str]:
    n = _n()
    args: dict[str, Any] = {"email": f"{role}{n}@example.test", "name": f"{role.title()} {n}"}
    args.update(kw)
    return auth_service.create_user(session, role=role, password=password, **args), password


def make_device(session: Session, trial: Trial, **kw: Any) -> tuple[Device, str]:
    n = _n()
    args: dict[str, Any] = {"serial": f"SN-{n:05d}", "hardware_model": "HX-1"}
    args.update(kw)
    return devices_service.register_device(session, trial=trial, **args)


def make_home(session: Session, trial: Trial, **kw: Any) -> Home:
    n = _n()
    args: dict[str, Any] = {"code": f"H-{n:04d}", "state": "active", "attributes": {}}
    args.update(kw)
    home = Home(trial_id=trial.id, **args)
    session.add(home)
    session.flush()
    return home


def make_installation(
    session: Session,
    device: Device,
    home: Home,
    *,
    room: str = "kitchen",
    installed_at: dt.datetime,
    removed_at: dt.datetime | None = None,
) -> Installation:
    inst = Installation(
        device_id=device.id, home_id=home.id, room=room, installed_at=installed_at, removed_at=removed_at
    )
    session.add(inst)
    session.flush()
    return inst


def sine_wav(
    seconds: float = 1.0,
    rate: int = 16000,
    freq: float = 1000.0,
    amp: float = 0.5,
    subtype: str = "PCM_16",
    fmt: str = "WAV",
    channels: int = 1,
    seed: int | None = None,
) -> bytes:
    t = np.arange(int(round(seconds * rate))) / rate
    x = amp * np.sin(2 * np.pi * freq * t)
    if seed is not None:
        x = x + 0.01 * np.random.default_rng(seed).standard_normal(len(t))
    data = np.stack([x] * channels, axis=1) if channels > 1 else x
    buf = io.BytesIO()
    sf.write(buf, data, rate, subtype=subtype, format=fmt)
    return buf.getvalue()


def make_alert(
    session: Session,
    store: ClipStore,
    settings: Settings,
    device: Device,
    *,
    event_id: str | None = None,
    sound_class: str = "smoke_alarm",
    score: float = 0.9,
    detected_at: dt.datetime | None = None,
    clip: bytes | None = None,
    clip_offset_s: float = 0.5,
    firmware: str = "1.0.0",
    now: dt.datetime | None = None,
) -> Alert:
    """An alert through the real ingest path (probe, clip store, attribution)."""
    import json

    n = _n()
    now = now or dt.datetime.now(dt.UTC)
    detected_at = detected_at or now
    clip = clip if clip is not None else sine_wav(seed=n)
    meta = json.dumps(
        {
            "event_id": event_id or f"ev-{n}",
            "sound_class": sound_class,
            "score": score,
            "detected_at": detected_at.isoformat(),
            "clip_offset_s": clip_offset_s,
            "firmware": firmware,
        }
    ).encode()
    with store.spool() as up:
        up.write(clip)
        result = devices_service.ingest_alert(
            session, store=store, settings=settings, device=device, meta_raw=meta, upload=up, now=now
        )
    alert = session.get(Alert, result.alert_id)
    assert alert is not None
    return alert


# --- households (register) ------------------------------------------------------------------------


def make_registered_home(
    session: Session,
    trial: Trial,
    *,
    state: str = "candidate",
    attributes: dict[str, Any] | None = None,
    at: dt.datetime | None = None,
    retention_days: int = 90,
    staff_may_listen: bool = True,
) -> Home:
    """A home created through the register service and walked to ``state`` (up to consented)."""
    from server.households import service as households_service

    at = at or (dt.datetime.now(dt.UTC).replace(microsecond=0) - dt.timedelta(days=120))
    home = households_service.create_home(session, trial, attributes=attributes or {}, at=at)
    if state == "candidate":
        return home
    if state == "declined":
        households_service.transition(session, home, "declined", at=at)
        return home
    households_service.transition(session, home, "screened", at=at)
    if state == "screened":
        return home
    households_service.record_consent(
        session,
        home,
        form_version="v1",
        consented_on=at.date(),
        retention_days=retention_days,
        staff_may_listen=staff_may_listen,
        mark_consented=True,
        at=at,
    )
    assert state == "consented", "walk further with install_device / transition"
    return home


def make_installed_home(
    session: Session,
    trial: Trial,
    device: Device,
    *,
    room: str = "kitchen",
    installed_at: dt.datetime,
    attributes: dict[str, Any] | None = None,
    state: str = "active",
    retention_days: int = 90,
) -> Home:
    """A consented home with ``device`` installed from ``installed_at``, then made ``state``."""
    from server.households import service as households_service

    home = make_registered_home(
        session,
        trial,
        state="consented",
        attributes=attributes,
        at=installed_at - dt.timedelta(days=1),
        retention_days=retention_days,
    )
    households_service.install_device(session, home=home, device=device, room=room, installed_at=installed_at)
    if state == "active":
        households_service.transition(session, home, "active", at=installed_at)
    return home
