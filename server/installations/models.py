"""Installations: a device in a home's room over a span of time, the hinge between devices and homes.

Imports neither server.devices nor server.households (both depend on this package): the tables it
points at are named by their foreign keys, the home and device by their names in the model registry.
"""

from __future__ import annotations

import datetime as dt
from typing import Protocol

from sqlalchemy import ForeignKey, Index, String
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow

ROOMS = ("kitchen", "hallway", "landing", "living_room", "nursery", "bedroom", "other")


class HomeRef(Protocol):
    """What installations read of a home (server.households.models.Home)."""

    id: int
    code: str
    trial_id: int


class DeviceRef(Protocol):
    """What installations read of a device (server.devices.models.Device)."""

    id: int
    serial: str
    trial_id: int
    revoked: bool


class Installation(Base):
    """A device in a home and room from installed_at until removed_at (open-ended when NULL)."""

    __tablename__ = "installation"
    __table_args__ = (Index("ix_installation_device_from", "device_id", "installed_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    device_id: Mapped[int] = mapped_column(ForeignKey("device.id"))
    home_id: Mapped[int] = mapped_column(ForeignKey("home.id"), index=True)
    room: Mapped[str] = mapped_column(String(20))
    installed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    removed_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    home: Mapped[HomeRef] = relationship("Home", lazy="joined")
    device: Mapped[DeviceRef] = relationship("Device")
