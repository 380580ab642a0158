"""Recruitment quota targets of a trial (the counted home states live on the Trial)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import JSON, ForeignKey, String
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base


class QuotaTarget(Base):
    """At least / at most N homes with attribute = value; attribute_key NULL means the total."""

    __tablename__ = "quota_target"

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id", ondelete="CASCADE"), index=True)
    label: Mapped[str] = mapped_column(String(200))
    attribute_key: Mapped[str | None] = mapped_column(String(60))
    # JSON-encoded value to match (true, "flat", 2); NULL with a key means "any truthy value".
    value: Mapped[Any] = mapped_column(JSON, nullable=True)
    min_count: Mapped[int | None]
    max_count: Mapped[int | None]
    position: Mapped[int] = mapped_column(default=0)
