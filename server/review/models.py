"""Verdicts given by reviewers, and gold checks (clips with a known answer)."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import ForeignKey, Index, String, Text, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.auth.models import User
from server.db import Base, UTCDateTime, utcnow
from server.devices.models import Alert

LABELS = ("confirmed", "false_alarm", "unsure", "unusable")
RESEMBLANCE = ("resembles", "unrelated")


class Verdict(Base):
    __tablename__ = "verdict"
    __table_args__ = (UniqueConstraint("alert_id", "round", name="uq_verdict_alert_round"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    alert_id: Mapped[int] = mapped_column(ForeignKey("alert.id", ondelete="CASCADE"), index=True)
    reviewer_id: Mapped[int] = mapped_column(ForeignKey("user_account.id"), index=True)
    # 1 = first review, 2 = blind second review, 3 = adjudication
    round: Mapped[int]
    label: Mapped[str] = mapped_column(String(20))
    cause: Mapped[str | None] = mapped_column(String(40))
    resemblance: Mapped[str | None] = mapped_column(String(20))
    note: Mapped[str | None] = mapped_column(Text)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # First verdicts only: True when the keyed random draw (queue.drawn_for_second_review) sent
    # the alert to a blind second review, whatever the label; False when it did not. "Unsure"
    # verdicts go to a second reviewer either way, so only this tells the random sample apart.
    # NULL on later rounds, and on first verdicts written without routing (see overview).
    random_draw: Mapped[bool | None] = mapped_column(nullable=True)

    reviewer: Mapped[User] = relationship(lazy="joined")


class GoldCheck(Base):
    """A clip whose right answer is known (e.g. from a staged event), served unannounced."""

    __tablename__ = "gold_check"

    id: Mapped[int] = mapped_column(primary_key=True)
    alert_id: Mapped[int] = mapped_column(ForeignKey("alert.id", ondelete="CASCADE"), unique=True)
    expected_label: Mapped[str] = mapped_column(String(20))
    expected_cause: Mapped[str | None] = mapped_column(String(40))
    created_by_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class GoldAnswer(Base):
    """One reviewer's answer to a gold check (kept apart so gold serving never touches the alert)."""

    __tablename__ = "gold_answer"
    __table_args__ = (UniqueConstraint("gold_check_id", "reviewer_id", name="uq_gold_answer_check_reviewer"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    gold_check_id: Mapped[int] = mapped_column(ForeignKey("gold_check.id", ondelete="CASCADE"))
    reviewer_id: Mapped[int] = mapped_column(ForeignKey("user_account.id"), index=True)
    label: Mapped[str] = mapped_column(String(20))
    cause: Mapped[str | None] = mapped_column(String(40))
    correct: Mapped[bool]
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


# The review queue finds a reviewer's claims on every hand-out; the claim columns live on the
# alert, but this index belongs to the review domain (and to its migration, 0003).
ix_alert_claimed_by = Index("ix_alert_claimed_by_id", Alert.claimed_by_id)
