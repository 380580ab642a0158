"""Server-side staff sessions: the browser's cookie holds only a random value (the session id).

The row holds the SHA-256 of that value, the user, the form (CSRF) token and the times that decide
whether it still counts. Nothing lives in process memory, so any number of server processes agree.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import secrets

from sqlalchemy import delete, or_, select, update
from sqlalchemy.orm import Session

from server.auth.models import StaffSession, User
from server.tokens import token_digest

COOKIE_NAME = "trialhouse_session"


@dataclasses.dataclass(frozen=True)
class Limits:
    idle_s: int
    max_age_s: int
    touch_s: int


def start(
    session: Session,
    user: User,
    *,
    now: dt.datetime,
    user_agent: str | None = None,
    client_addr: str | None = None,
) -> tuple[StaffSession, str]:
    """A new session row for ``user``; returns it and the value for the cookie (shown only here)."""
    raw = secrets.token_urlsafe(32)
    row = StaffSession(
        token_hash=token_digest(raw),
        user_id=user.id,
        csrf_token=secrets.token_urlsafe(32),
        created_at=now,
        last_seen_at=now,
        user_agent=(user_agent or "")[:200] or None,
        client_addr=(client_addr or "")[:64] or None,
    )
    session.add(row)
    session.flush()
    return row, raw


def ends_at(row: StaffSession, limits: Limits) -> dt.datetime:
    """When the session lapses if nothing else happens: the earlier of its idle and absolute limits."""
    return min(
        row.last_seen_at + dt.timedelta(seconds=limits.idle_s),
        row.created_at + dt.timedelta(seconds=limits.max_age_s),
    )


def find(session: Session, raw: str, *, now: dt.datetime, limits: Limits) -> StaffSession | None:
    """The live session whose cookie value is ``raw``, or None (unknown, ended, lapsed, inactive user)."""
    if not raw or len(raw) > 200:
        return None
    row = session.scalar(
        select(StaffSession)
        .where(StaffSession.token_hash == token_digest(raw))
        .execution_options(populate_existing=True)
    )
    if row is None or row.revoked_at is not None or not row.user.active:
        return None
    if now >= ends_at(row, limits):
        return None
    return row


def touch_due(row: StaffSession, *, now: dt.datetime, limits: Limits) -> bool:
    return (now - row.last_seen_at).total_seconds() >= limits.touch_s


def touch(session: Session, row: StaffSession, *, now: dt.datetime) -> None:
    """Record activity (one UPDATE; callers do it at most once per ``touch_s``)."""
    session.execute(
        update(StaffSession)
        .where(StaffSession.id == row.id, StaffSession.revoked_at.is_(None))
        .values(last_seen_at=now)
    )
    row.last_seen_at = now


def end(session: Session, row_id: int, *, reason: str, now: dt.datetime) -> bool:
    result = session.execute(
        update(StaffSession)
        .where(StaffSession.id == row_id, StaffSession.revoked_at.is_(None))
        .values(revoked_at=now, end_reason=reason[:40])
    )
    return bool(result.rowcount)  # type: ignore[attr-defined]


def end_all(
    session: Session, user_id: int, *, reason: str, now: dt.datetime, keep_id: int | None = None
) -> int:
    stmt = (
        update(StaffSession)
        .where(StaffSession.user_id == user_id, StaffSession.revoked_at.is_(None))
        .values(revoked_at=now, end_reason=reason[:40])
    )
    if keep_id is not None:
        stmt = stmt.where(StaffSession.id != keep_id)
    result = session.execute(stmt)
    return int(result.rowcount)  # type: ignore[attr-defined]


def list_live(session: Session, user_id: int, *, now: dt.datetime, limits: Limits) -> list[StaffSession]:
    rows = session.scalars(
        select(StaffSession)
        .where(StaffSession.user_id == user_id, StaffSession.revoked_at.is_(None))
        .order_by(StaffSession.last_seen_at.desc())
    )
    return [r for r in rows if now < ends_at(r, limits)]


def purge(session: Session, *, now: dt.datetime, limits: Limits, keep_days: int = 30) -> int:
    """Delete rows of sessions that ended (or lapsed at the latest) more than ``keep_days`` ago."""
    cutoff = now - dt.timedelta(days=keep_days)
    lapsed = now - dt.timedelta(seconds=limits.max_age_s) - dt.timedelta(days=keep_days)
    result = session.execute(
        delete(StaffSession).where(or_(StaffSession.revoked_at < cutoff, StaffSession.created_at < lapsed))
    )
    return int(result.rowcount)  # type: ignore[attr-defined]
