"""Devices, their monitored (listening) time, alert clips and alerts."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import Float, ForeignKey, Index, String, UniqueConstraint, text
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow


class Device(Base):
    __tablename__ = "device"

    id: Mapped[int] = mapped_column(primary_key=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id"), index=True)
    serial: Mapped[str] = mapped_column(String(64), unique=True)
    hardware_model: Mapped[str] = mapped_column(String(64), default="unknown")
    firmware: Mapped[str | None] = mapped_column(String(64))
    # SHA-256 of the bearer token (tokens are 32 random bytes, so a fast hash is sound here).
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    revoked: Mapped[bool] = mapped_column(default=False)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    heartbeat_interval_s: Mapped[int] = mapped_column(default=60)
    last_seen_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    # Device clock minus server clock at the last heartbeat (positive: device runs ahead).
    clock_skew_s: Mapped[float | None] = mapped_column(Float)
    # The earliest effective detection time among this device's alerts not yet known to lie inside a
    # listening segment (see Alert.within_listening); the next heartbeat looks at them. NULL: none.
    listening_check_from: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    def __repr__(self) -> str:
        return f"<Device {self.serial}>"


class ListeningSegment(Base):
    """A stretch of server time during which the device reported that it was listening."""

    __tablename__ = "listening_segment"
    __table_args__ = (Index("ix_listening_segment_device_start", "device_id", "started_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    device_id: Mapped[int] = mapped_column(ForeignKey("device.id", ondelete="CASCADE"))
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    ended_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, index=True)
    is_open: Mapped[bool] = mapped_column(default=True)
    heartbeats: Mapped[int] = mapped_column(default=1)


class FirmwareChange(Base):
    """From `at` on, the device's heartbeats reported `firmware` (written when the reported value
    changes), so monitored time can be credited to the firmware that was running."""

    __tablename__ = "firmware_change"
    __table_args__ = (Index("ix_firmware_change_device_at", "device_id", "at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    device_id: Mapped[int] = mapped_column(ForeignKey("device.id", ondelete="CASCADE"))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    firmware: Mapped[str] = mapped_column(String(64))


class Clip(Base):
    """Audio bytes as received, content-addressed by SHA-256 in the clip store.

    One live row per SHA-256; erased rows keep theirs, so identical bytes sent later get a new row
    and never bring an erased alert's audio back.
    """

    __tablename__ = "clip"
    __table_args__ = (
        Index(
            "ix_clip_sha256_live",
            "sha256",
            unique=True,
            sqlite_where=text("erased_at IS NULL"),
            postgresql_where=text("erased_at IS NULL"),
        ),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    sha256: Mapped[str] = mapped_column(String(64))
    storage_key: Mapped[str] = mapped_column(String(200))
    format: Mapped[str] = mapped_column(String(16))
    subtype: Mapped[str] = mapped_column(String(16))
    sample_rate_hz: Mapped[int]
    channels: Mapped[int]
    frames: Mapped[int]
    duration_s: Mapped[float] = mapped_column(Float)
    peak_dbfs: Mapped[float] = mapped_column(Float)
    rms_dbfs: Mapped[float] = mapped_column(Float)
    clipped_fraction: Mapped[float] = mapped_column(Float)
    size_bytes: Mapped[int]
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # Set when the file was removed from the store (erasure, retention, private content).
    erased_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    erased_reason: Mapped[str | None] = mapped_column(String(40))


class AlertState:
    """Where an alert stands in review. Stored as plain strings."""

    pending = "pending"  # waiting for a first verdict
    second_review = "second_review"  # waiting for a blind second verdict
    adjudication = "adjudication"  # two verdicts disagree
    final = "final"  # final_label is set

    all = (pending, second_review, adjudication, final)


class Alert(Base):
    __tablename__ = "alert"
    __table_args__ = (
        UniqueConstraint("device_id", "event_id", name="uq_alert_device_event"),
        Index("ix_alert_state_received", "state", "received_at"),
        Index("ix_alert_home_detected", "home_id", "detected_at"),
        Index("ix_alert_trial_detected", "trial_id", "detected_at"),
        # The review backlog of one trial (open states, oldest first) from the index alone.
        Index("ix_alert_trial_state_received", "trial_id", "state", "received_at"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    device_id: Mapped[int] = mapped_column(ForeignKey("device.id"), index=True)
    trial_id: Mapped[int] = mapped_column(ForeignKey("trial.id"))
    # Resolved from the installation active at the detection time; NULL means unassigned.
    home_id: Mapped[int | None] = mapped_column(ForeignKey("home.id"))
    installation_id: Mapped[int | None] = mapped_column(ForeignKey("installation.id"), index=True)
    event_id: Mapped[str] = mapped_column(String(128))
    sound_class: Mapped[str] = mapped_column(String(64))
    score: Mapped[float] = mapped_column(Float)
    # As sent by the device (converted to UTC); detected_at_text keeps the original string.
    detected_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    detected_at_text: Mapped[str] = mapped_column(String(64))
    # Device clock skew known at receipt; attribution uses detected_at - clock_skew_s.
    clock_skew_s: Mapped[float | None] = mapped_column(Float)
    received_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    firmware: Mapped[str] = mapped_column(String(64))
    clip_id: Mapped[int] = mapped_column(ForeignKey("clip.id"), index=True)
    clip_offset_s: Mapped[float] = mapped_column(Float)
    # True once the effective detection time is known to lie inside one of the device's listening
    # segments. Segments only ever grow, so True never goes stale; NULL means "not known yet" (the
    # device was not listening then, or no heartbeat has covered that time yet) and analytics checks
    # the segments for itself. It only spares the weekly summary a segment look-up per alert.
    within_listening: Mapped[bool | None] = mapped_column()

    state: Mapped[str] = mapped_column(String(20), default=AlertState.pending)
    needs_second_review: Mapped[bool] = mapped_column(default=False)
    claimed_by_id: Mapped[int | None] = mapped_column(ForeignKey("user_account.id", ondelete="SET NULL"))
    claim_expires_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    # The verdict that counts: confirmed | false_alarm | unsure | unusable
    final_label: Mapped[str | None] = mapped_column(String(20))
    final_cause: Mapped[str | None] = mapped_column(String(40))
    # resembles (forgivable) | unrelated (unforgivable)
    final_resemblance: Mapped[str | None] = mapped_column(String(20))
    # single | agreed | adjudicated
    final_method: Mapped[str | None] = mapped_column(String(20))
    finalized_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    private_flag: Mapped[bool] = mapped_column(default=False)
    private_flagged_by_id: Mapped[int | None] = mapped_column(
        ForeignKey("user_account.id", ondelete="SET NULL")
    )

    device: Mapped[Device] = relationship(lazy="joined")
    clip: Mapped[Clip] = relationship(lazy="joined")

    @property
    def effective_at(self) -> dt.datetime:
        """Detection time on the server's clock, correcting a known device clock skew."""
        if self.clock_skew_s:
            return self.detected_at - dt.timedelta(seconds=self.clock_skew_s)
        return self.detected_at
