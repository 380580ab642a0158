"""Homes, their lifecycle, consent, personal data and attributes (the catalogue)."""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import ForeignKey, String, Text, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base, UTCDateTime, utcnow


class HomeState:
    candidate = "candidate"
    screened = "screened"
    consented = "consented"
    installed = "installed"
    active = "active"
    paused = "paused"
    withdrawn = "withdrawn"
    declined = "declined"

    all = (candidate, screened, consented, installed, active, paused, withdrawn, declined)
    # States in which a home's installed devices contribute monitored time.
    monitored = (installed, active, paused)


class Home(Base):
    __tablename__ = "home"

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id"), index=True)
    code: Mapped[str] = mapped_column(String(16), unique=True)
    state: Mapped[str] = mapped_column(String(20), default=HomeState.candidate)
    state_changed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # Catalogue key -> value (bool, str or int), validated against AttributeDefinition.
    attributes: Mapped[dict[str, Any]] = mapped_column(default=dict)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    erased_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)

    def __repr__(self) -> str:
        return f"<Home {self.code} {self.state}>"


class HomeStateChange(Base):
    __tablename__ = "home_state_change"

    id: Mapped[int] = mapped_column(primary_key=True)
    home_id: Mapped[int] = mapped_column(ForeignKey("home.id", ondelete="CASCADE"), index=True)
    from_state: Mapped[str | None] = mapped_column(String(20))
    to_state: Mapped[str] = mapped_column(String(20))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    by_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    note: Mapped[str | None] = mapped_column(Text)
    # Paused homes may keep listening (monitored) or not; recorded on the pause transition.
    listening: Mapped[bool] = mapped_column(default=True)


class Consent(Base):
    __tablename__ = "consent"

    id: Mapped[int] = mapped_column(primary_key=True)
    home_id: Mapped[int] = mapped_column(ForeignKey("home.id", ondelete="CASCADE"), index=True)
    form_version: Mapped[str] = mapped_column(String(40))
    consented_on: Mapped[dt.date]
    staff_may_listen: Mapped[bool] = mapped_column(default=True)
    retention_days: Mapped[int] = mapped_column(default=90)
    recorded_by_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    recorded_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class HomeContact(Base):
    """Personal data: shown only to coordinators and admins; every view and export is audited."""

    __tablename__ = "home_contact"

    id: Mapped[int] = mapped_column(primary_key=True)
    home_id: Mapped[int] = mapped_column(ForeignKey("home.id", ondelete="CASCADE"), unique=True)
    names: Mapped[str] = mapped_column(String(300), default="")
    address: Mapped[str] = mapped_column(Text, default="")
    phone: Mapped[str] = mapped_column(String(60), default="")
    email: Mapped[str] = mapped_column(String(254), default="")
    access_notes: Mapped[str] = mapped_column(Text, default="")
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class AttributeDefinition(Base):
    __tablename__ = "attribute_definition"
    __table_args__ = (UniqueConstraint("trial_id", "key", name="uq_attribute_definition_trial_key"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id", ondelete="CASCADE"))
    key: Mapped[str] = mapped_column(String(60))
    label: Mapped[str] = mapped_column(String(200))
    # yes_no | one_of | whole_number
    kind: Mapped[str] = mapped_column(String(20))
    options: Mapped[list[str]] = mapped_column(default=list)
    # Inclusive bounds of a whole number (NULL: unbounded on that side).
    min_value: Mapped[int | None]
    max_value: Mapped[int | None]
    position: Mapped[int] = mapped_column(default=0)
