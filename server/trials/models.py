"""A trial: the pilot that devices, homes and alerts belong to."""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import Float, ForeignKey, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from server.db import Base, UTCDateTime, utcnow

DEFAULT_CAUSES: list[dict[str, Any]] = [
    {"code": "speech", "label": "Speech or shouting"},
    {"code": "tv_radio_music", "label": "TV, radio or music"},
    {"code": "dog", "label": "Dog"},
    {"code": "cat_other_pet", "label": "Cat or other pet"},
    {"code": "other_child_sound", "label": "Another child sound"},
    {"code": "kitchen_cooking", "label": "Kitchen and cooking"},
    {"code": "appliance", "label": "Household appliance"},
    {"code": "door_knock_impact", "label": "Door, knock or impact"},
    {"code": "other_alarm_beep", "label": "Another alarm or beep"},
    {"code": "traffic_aircraft", "label": "Traffic or aircraft outside"},
    {"code": "tools_building", "label": "Tools or building work"},
    {"code": "unknown", "label": "Unknown"},
]


class Trial(Base):
    __tablename__ = "trial"

    id: Mapped[int] = mapped_column(primary_key=True)
    code: Mapped[str] = mapped_column(String(40), unique=True)
    name: Mapped[str] = mapped_column(String(200))
    starts_on: Mapped[dt.date]
    ends_on: Mapped[dt.date | None]
    sound_classes: Mapped[list[str]]
    fa_target_per_home_month: Mapped[float] = mapped_column(Float, default=1.0)
    # IANA zone name; local times on pages and reports are shown in it.
    timezone: Mapped[str] = mapped_column(String(64), default="UTC")
    causes: Mapped[list[dict[str, Any]]] = mapped_column(default=lambda: [dict(c) for c in DEFAULT_CAUSES])
    second_review_share: Mapped[float] = mapped_column(Float, default=0.10)
    # Lifecycle states whose homes count toward the recruitment quota.
    quota_states: Mapped[list[str]] = mapped_column(default=lambda: ["consented", "installed", "active"])
    # Days to keep the clips of alerts with no home's consent behind them (unassigned alerts, or a
    # home with no consent on record); `trialhouse storage purge` removes them after that.
    unassigned_clip_retention_days: Mapped[int] = mapped_column(default=30, server_default="30")
    # Alerts of one sound class from one home at most this many seconds after the first alert of
    # a disturbance belong to it: the household was disturbed once (see analytics/disturbances.py).
    disturbance_window_s: Mapped[float] = mapped_column(Float, default=60.0, server_default="60")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    def __repr__(self) -> str:
        return f"<Trial {self.code}>"


class TrialMembership(Base):
    """A staff member limited to this trial. A non-admin with any rows sees only those trials; one
    with none sees every trial (see trials/service.py ``visible_trial_ids``)."""

    __tablename__ = "trial_membership"
    __table_args__ = (UniqueConstraint("user_id", "trial_id", name="uq_trial_membership_user_trial"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id", ondelete="CASCADE"), index=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id", ondelete="CASCADE"), index=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
