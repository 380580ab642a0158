"""Reading the audit trail: filters (actor, action, home or object, date range), pages and CSV export.

Reads only, except that an export records itself in the trail.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

from sqlalchemy import ColumnElement, and_, func, or_, select
from sqlalchemy.orm import Session

from server import audit
from server.admin.service import has_control_characters
from server.auth.models import AuditEvent, User
from server.errors import ValidationFailed
from server.households import service as households_service
from server.installations.models import Installation
from server.web.csvsafe import safe_cell

PER_PAGE = 50
MAX_PER_PAGE = 500
FILTER_FIELDS = ("actor", "action", "home", "object_type", "object_id", "since", "until")
CSV_COLUMNS = ("id", "at_utc", "actor", "action", "object_type", "object_id", "detail")


@dataclass(frozen=True)
class TrailFilter:
    """Blank fields do not filter. ``since``/``until`` are UTC calendar days, both included."""

    actor: str = ""
    action: str = ""
    home: str = ""
    object_type: str = ""
    object_id: str = ""
    since: dt.date | None = None
    until: dt.date | None = None
    home_id: int | None = field(default=None, compare=False)

    def query_items(self) -> list[tuple[str, str]]:
        """The filter as query-string pairs (for page links and the CSV link), blanks left out."""
        values = {
            "actor": self.actor,
            "action": self.action,
            "home": self.home,
            "object_type": self.object_type,
            "object_id": self.object_id,
            "since": self.since.isoformat() if self.since else "",
            "until": self.until.isoformat() if self.until else "",
        }
        return [(k, v) for k, v in values.items() if v]


@dataclass(frozen=True)
class TrailPage:
    events: list[AuditEvent]
    total: int
    page: int
    per_page: int

    @property
    def pages(self) -> int:
        return max(1, math.ceil(self.total / self.per_page))


def _date(value: str, name: str, errors: dict[str, str]) -> dt.date | None:
    value = value.strip()
    if not value:
        return None
    try:
        return dt.date.fromisoformat(value)
    except ValueError:
        errors[name] = f"'{value[:40]}' is not a date; use YYYY-MM-DD."
        return None


def parse_filter(session: Session, params: Mapping[str, str]) -> TrailFilter:
    """Read and check the filter fields; every problem is reported against its field."""
    errors: dict[str, str] = {}
    text = {k: str(params.get(k) or "").strip()[:200] for k in FILTER_FIELDS}
    for k, v in text.items():
        if has_control_characters(v):
            errors[k] = "Control characters are not allowed in a filter."
            text[k] = ""
    since = _date(text["since"], "since", errors)
    until = _date(text["until"], "until", errors)
    if since and until and since > until:
        errors["until"] = "The end date is before the start date."
    home_id = None
    if text["home"]:
        home = households_service.find_home(session, text["home"])
        if home is None:
            errors["home"] = f"No home has code {text['home']}."
        else:
            home_id, text["home"] = home.id, home.code
    if text["object_id"] and not text["object_type"]:
        errors["object_type"] = "Choose the kind of object the id belongs to."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    return TrailFilter(
        actor=text["actor"],
        action=text["action"],
        home=text["home"],
        object_type=text["object_type"],
        object_id=text["object_id"],
        since=since,
        until=until,
        home_id=home_id,
    )


def _day_start(day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(), tzinfo=dt.UTC)


def _conditions(session: Session, flt: TrailFilter) -> list[ColumnElement[bool]]:
    conds: list[ColumnElement[bool]] = []
    if flt.actor:
        needle = flt.actor.lower()
        by_email = select(User.id).where(func.lower(User.email).contains(needle, autoescape=True))
        conds.append(
            or_(
                func.lower(AuditEvent.actor_label).contains(needle, autoescape=True),
                AuditEvent.actor_id.in_(by_email),
            )
        )
    if flt.action:
        conds.append(AuditEvent.action == flt.action)
    if flt.home_id is not None:
        # A home's events: those about the home itself and those about its installations.
        installations = [
            str(i)
            for i in session.scalars(select(Installation.id).where(Installation.home_id == flt.home_id))
        ]
        about_home = and_(AuditEvent.object_type == "home", AuditEvent.object_id == str(flt.home_id))
        if installations:
            conds.append(
                or_(
                    about_home,
                    and_(AuditEvent.object_type == "installation", AuditEvent.object_id.in_(installations)),
                )
            )
        else:
            conds.append(about_home)
    if flt.object_type:
        conds.append(AuditEvent.object_type == flt.object_type)
    if flt.object_id:
        conds.append(AuditEvent.object_id == flt.object_id)
    if flt.since:
        conds.append(AuditEvent.at >= _day_start(flt.since))
    if flt.until:
        conds.append(AuditEvent.at < _day_start(flt.until + dt.timedelta(days=1)))
    return conds


def list_events(session: Session, flt: TrailFilter, *, page: int = 1, per_page: int = PER_PAGE) -> TrailPage:
    """Newest first; ``page`` counts from 1 and a page past the end comes back empty."""
    page = max(1, page)
    per_page = min(max(1, per_page), MAX_PER_PAGE)
    conds = _conditions(session, flt)
    total = session.scalar(select(func.count(AuditEvent.id)).where(*conds)) or 0
    events = list(
        session.scalars(
            select(AuditEvent)
            .where(*conds)
            .order_by(AuditEvent.at.desc(), AuditEvent.id.desc())
            .offset((page - 1) * per_page)
            .limit(per_page)
        )
    )
    return TrailPage(events=events, total=total, page=page, per_page=per_page)


def list_actions(session: Session) -> list[str]:
    return list(session.scalars(select(AuditEvent.action).distinct().order_by(AuditEvent.action)))


def list_object_types(session: Session) -> list[str]:
    return list(session.scalars(select(AuditEvent.object_type).distinct().order_by(AuditEvent.object_type)))


def detail_text(event: AuditEvent) -> str:
    return json.dumps(event.detail or {}, sort_keys=True, ensure_ascii=False, default=str)


def export_csv(session: Session, flt: TrailFilter, *, actor: User | str) -> tuple[str, int]:
    """Every matching event as CSV text (newest first), each cell escaped against spreadsheet formulas.

    The export itself is recorded in the trail, after the rows are read, so it is not in its own file.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 line ends
    writer.writerow(CSV_COLUMNS)
    rows = 0
    stmt = (
        select(AuditEvent)
        .where(*_conditions(session, flt))
        .order_by(AuditEvent.at.desc(), AuditEvent.id.desc())
        .execution_options(yield_per=1000)
    )
    for event in session.scalars(stmt):
        writer.writerow(
            [
                safe_cell(v)
                for v in (
                    event.id,
                    event.at.astimezone(dt.UTC).isoformat(),
                    event.actor_label,
                    event.action,
                    event.object_type,
                    event.object_id or "",
                    detail_text(event),
                )
            ]
        )
        rows += 1
    audit.record(
        session, actor, "audit.export", "audit_trail", None, {"filter": dict(flt.query_items()), "rows": rows}
    )
    return out.getvalue(), rows
