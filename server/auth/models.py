"""Staff users, their personal API tokens, and the audit trail."""

from __future__ import annotations

import datetime as dt
import enum
from typing import Any

from sqlalchemy import ForeignKey, String
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
    revoked: Mapped[bool] = mapped_column(default=False)

    user: Mapped[User] = relationship(lazy="joined")


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
