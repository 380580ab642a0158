"""Staff users, their personal API tokens, and the audit trail."""

from __future__ import annotations

import datetime as dt
import enum
from typing import Any

from sqlalchemy import ForeignKey, Index, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow


class Role(enum.StrEnum):
    admin = "admin"
    coordinator = "coordinator"
    reviewer = "reviewer"
    lead = "lead"


class User(Base):
    __tablename__ = "user_account"

    id: Mapped[int] = mapped_column(primary_key=True)
    email: Mapped[str] = mapped_column(String(254), unique=True)
    name: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(20))
    password_hash: Mapped[str] = mapped_column(String(255))
    is_adjudicator: Mapped[bool] = mapped_column(default=False)
    active: Mapped[bool] = mapped_column(default=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_login_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    # Set by an admin who chose the password: every staff route but the account page answers 403
    # until the user picks their own.
    must_change_password: Mapped[bool] = mapped_column(default=False)

    def __repr__(self) -> str:
        return f"<User {self.email} {self.role}>"


class ApiToken(Base):
    """A personal token for the staff JSON API; only its SHA-256 is stored."""

    __tablename__ = "api_token"

    id: Mapped[int] = mapped_column(primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id", ondelete="CASCADE"), index=True)
    label: Mapped[str] = mapped_column(String(100))
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_used_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    expires_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    revoked: Mapped[bool] = mapped_column(default=False)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)

    user: Mapped[User] = relationship(lazy="joined")

    def state(self, now: dt.datetime) -> str:
        if self.revoked:
            return "revoked"
        return "expired" if self.expires_at <= now else "live"


class StaffSession(Base):
    """A signed-in browser. The cookie holds a random value; only its SHA-256 is stored here.

    A session ends when its row says so (``revoked_at``), after ``Settings.session_idle_s`` without
    a request, or ``Settings.session_max_age_s`` after sign-in, whichever comes first.
    """

    __tablename__ = "staff_session"

    id: Mapped[int] = mapped_column(primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id", ondelete="CASCADE"), index=True)
    # The form token of this session (not a credential by itself: it only proves a form came from
    # one of our pages).
    csrf_token: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    last_seen_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    end_reason: Mapped[str | None] = mapped_column(String(40))
    user_agent: Mapped[str | None] = mapped_column(String(200))
    client_addr: Mapped[str | None] = mapped_column(String(64))

    user: Mapped[User] = relationship(lazy="joined")


class SignInStrikes(Base):
    """Failed sign-ins counted per account (e-mail digest) or per client address, for throttling.

    Kept in the database so every server process sees the same count.
    """

    __tablename__ = "sign_in_strikes"
    __table_args__ = (
        UniqueConstraint("kind", "key_digest"),
        Index("ix_sign_in_strikes_last", "last_failed_at"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(10))  # "account" | "address"
    key_digest: Mapped[str] = mapped_column(String(64))
    failures: Mapped[int] = mapped_column(default=0)
    first_failed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    last_failed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    blocked_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)


class AuditEvent(Base):
    __tablename__ = "audit_event"

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow, index=True)
    actor_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    # Who acted when no user did: "cli", "device:<serial>", "system".
    actor_label: Mapped[str] = mapped_column(String(120))
    action: Mapped[str] = mapped_column(String(80), index=True)
    object_type: Mapped[str] = mapped_column(String(40))
    object_id: Mapped[str | None] = mapped_column(String(80))
    detail: Mapped[dict[str, Any]] = mapped_column(default=dict)
