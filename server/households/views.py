"""Read models for the register pages and API: everything a page shows comes from one call here,
so templates run no queries. No personal data passes through this module.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.auth.models import User
from server.db import utcnow
from server.devices.models import Alert, Device, ListeningSegment
from server.households import catalogue, lifecycle, service
from server.households import timeline as intervals
from server.households.models import (
    AttributeDefinition,
    Consent,
    Home,
    HomeStateChange,
)
from server.installations.models import Installation
from server.staged import service as staged_service
from server.staged.models import StagedEvent
from server.trials.models import Trial

WEEKS_SHOWN = 12


@dataclass(frozen=True)
class InstallationLine:
    id: int
    serial: str
    room: str
    installed_at: dt.datetime
    removed_at: dt.datetime | None
    last_seen_at: dt.datetime | None
    firmware: str | None

    @property
    def is_open(self) -> bool:
        return self.removed_at is None


@dataclass(frozen=True)
class ClassCount:
    sound_class: str
    total: int
    confirmed: int
    false_alarm: int
    other_final: int  # unsure or unusable
    open: int  # not finally labelled yet


@dataclass(frozen=True)
class TimelineLine:
    at: dt.datetime
    from_state: str | None
    to_state: str
    author: str
    note: str | None
    listening: bool


@dataclass(frozen=True)
class HomeOverview:
    home: Home
    trial: Trial
    attributes: list[tuple[AttributeDefinition, str]]
    consent: Consent | None
    consents: list[Consent]
    timeline: list[TimelineLine]
    installations: list[InstallationLine]
    alerts_by_class: list[ClassCount]
    weekly_hours: list[intervals.WeekHours]
    staged: list[StagedEvent]
    has_contact: bool
    next_states: tuple[str, ...]


def _author(user: User | None) -> str:
    return user.name if user is not None else "system"


def installation_lines(session: Session, home: Home) -> list[InstallationLine]:
    rows = session.execute(
        select(Installation, Device)
        .join(Device, Device.id == Installation.device_id)
        .where(Installation.home_id == home.id)
        .order_by(Installation.installed_at.desc(), Installation.id.desc())
    )
    return [
        InstallationLine(i.id, d.serial, i.room, i.installed_at, i.removed_at, d.last_seen_at, d.firmware)
        for i, d in rows
    ]


def alerts_by_class(session: Session, home: Home) -> list[ClassCount]:
    rows = session.execute(
        select(Alert.sound_class, Alert.final_label, func.count(Alert.id))
        .where(Alert.home_id == home.id)
        .group_by(Alert.sound_class, Alert.final_label)
    )
    acc: dict[str, dict[str, int]] = {}
    for cls, label, n in rows:
        d = acc.setdefault(cls, {"confirmed": 0, "false_alarm": 0, "other": 0, "open": 0})
        key = label if label in ("confirmed", "false_alarm") else ("open" if label is None else "other")
        d[key] += int(n)
    return [
        ClassCount(c, sum(d.values()), d["confirmed"], d["false_alarm"], d["other"], d["open"])
        for c, d in sorted(acc.items())
    ]


def weekly_listening(
    session: Session, home: Home, tz: str, now: dt.datetime, installs: list[InstallationLine] | None = None
) -> list[intervals.WeekHours]:
    """Hours per local week during which at least one of the home's installed devices listened."""
    installs = installs if installs is not None else installation_lines(session, home)
    if not installs:
        return []
    periods = session.execute(
        select(Installation.device_id, Installation.installed_at, Installation.removed_at).where(
            Installation.home_id == home.id
        )
    )
    pieces: list[intervals.Interval] = []
    for device_id, start, end in periods:
        end = end or now
        segs = session.execute(
            select(ListeningSegment.started_at, ListeningSegment.ended_at).where(
                ListeningSegment.device_id == device_id,
                ListeningSegment.ended_at > start,
                ListeningSegment.started_at < end,
            )
        )
        pieces += intervals.clip([(s, e) for s, e in segs], start, end)
    last_end = max((i.removed_at or now) for i in installs)
    first = min(i.installed_at for i in installs)
    last_week = intervals.week_start_of(min(last_end, now), tz)
    first_week = max(intervals.week_start_of(first, tz), last_week - dt.timedelta(weeks=WEEKS_SHOWN - 1))
    return intervals.hours_per_week(pieces, tz, first_week=first_week, last_week=last_week)


def home_overview(session: Session, home: Home, *, now: dt.datetime | None = None) -> HomeOverview:
    now = now or utcnow()
    trial = service.trial_of(session, home)
    specs = catalogue.list_catalogue(session, trial)
    attrs = [(s, catalogue.format_value((home.attributes or {}).get(s.key))) for s in specs]
    consents = list(
        session.scalars(
            select(Consent)
            .where(Consent.home_id == home.id)
            .order_by(Consent.recorded_at.desc(), Consent.id.desc())
        )
    )
    lines = [
        TimelineLine(c.at, c.from_state, c.to_state, _author(u), c.note, c.listening)
        for c, u in service.timeline_of(session, home)
    ]
    installs = installation_lines(session, home)
    return HomeOverview(
        home=home,
        trial=trial,
        attributes=attrs,
        consent=consents[0] if consents else None,
        consents=consents,
        timeline=lines,
        installations=installs,
        alerts_by_class=alerts_by_class(session, home),
        weekly_hours=weekly_listening(session, home, trial.timezone, now, installs),
        staged=staged_service.list_staged_events(session, home=home),
        has_contact=service.has_contact(session, home),
        next_states=() if home.erased_at else lifecycle.NEXT.get(home.state, ()),
    )


@dataclass(frozen=True)
class RegisterRow:
    code: str
    state: str
    state_changed_at: dt.datetime
    attributes: dict[str, Any]
    devices: int  # open installations
    consented: bool
    erased: bool


def register_rows(session: Session, homes: list[Home]) -> list[RegisterRow]:
    ids = [h.id for h in homes]
    open_counts: dict[int, int] = {}
    consented: set[int] = set()
    if ids:
        open_counts = {
            hid: int(n)
            for hid, n in session.execute(
                select(Installation.home_id, func.count(Installation.id))
                .where(Installation.home_id.in_(ids), Installation.removed_at.is_(None))
                .group_by(Installation.home_id)
            )
        }
        consented = set(session.scalars(select(Consent.home_id).where(Consent.home_id.in_(ids))))
    return [
        RegisterRow(
            h.code,
            h.state,
            h.state_changed_at,
            dict(h.attributes or {}),
            open_counts.get(h.id, 0),
            h.id in consented,
            h.erased_at is not None,
        )
        for h in homes
    ]


def last_change(session: Session, home: Home) -> HomeStateChange | None:
    return session.scalar(
        select(HomeStateChange)
        .where(HomeStateChange.home_id == home.id)
        .order_by(HomeStateChange.at.desc(), HomeStateChange.id.desc())
        .limit(1)
    )
