"""Staged test events: a test sound played on purpose in a home."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import Float, ForeignKey, String, Text
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base, UTCDateTime, utcnow


class StagedEvent(Base):
    """A test sound played on purpose in a home, to measure detection."""

    __tablename__ = "staged_event"

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id"), index=True)
    home_id: Mapped[int] = mapped_column(ForeignKey("home.id"), index=True)
    sound_class: Mapped[str] = mapped_column(String(64))
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    ended_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    source: Mapped[str] = mapped_column(Text, default="")
    level_db: Mapped[float | None] = mapped_column(Float)
    created_by_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
