"""Device API bodies. JSON is strict: no type coercion, no NaN or Infinity; unknown fields ignored."""

from __future__ import annotations

import datetime as dt
import re

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, field_validator

_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")
_HEX64 = re.compile(r"^[0-9a-fA-F]{64}$")
# RFC 3339 section 5.6 date-time, offset required ("T" may be "t" or, per its note, a space).
# Without this, a string of digits would be read as a Unix time.
_RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})$")

STRICT = ConfigDict(strict=True, extra="ignore", allow_inf_nan=False)


def _rfc3339(v: object) -> object:
    """Parse an RFC 3339 string; anything else is left for the strict type check to refuse."""
    if not isinstance(v, str):
        return v
    if not _RFC3339.match(v):
        raise ValueError("must be an RFC 3339 date-time with an offset, such as 2026-03-02T11:57:30Z")
    try:
        return dt.datetime.fromisoformat(re.sub(r"(\.\d{6})\d+", r"\1", v).replace("z", "Z"))
    except ValueError as exc:
        raise ValueError(f"is not a valid date-time ({exc})") from exc


def json_datetime(v: object) -> object:
    """Staff JSON times: an RFC 3339 string with an offset, never a number (an epoch is not a time)."""
    if not isinstance(v, str):
        raise ValueError("must be an RFC 3339 date-time string with an offset, such as 2026-03-02T11:57:30Z")
    return _rfc3339(v)


_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def json_date(v: object) -> object:
    """Staff JSON dates: a YYYY-MM-DD string, nothing else."""
    if not isinstance(v, str) or not _ISO_DATE.match(v):
        raise ValueError("must be a date string such as 2026-03-02")
    try:
        return dt.date.fromisoformat(v)
    except ValueError as exc:
        raise ValueError(f"is not a valid date ({exc})") from exc


def _printable(v: str) -> str:
    if _CONTROL.search(v):
        raise ValueError("must not contain control characters")
    return v


class HeartbeatIn(BaseModel):
    model_config = STRICT

    sent_at: AwareDatetime
    listening: bool
    firmware: str = Field(min_length=1, max_length=64)

    _sent_at_format = field_validator("sent_at", mode="before")(_rfc3339)
    _firmware_printable = field_validator("firmware")(_printable)


class HeartbeatOut(BaseModel):
    received_at: dt.datetime
    next_heartbeat_s: int


class EventIdOnly(BaseModel):
    """The idempotency key alone, read before the rest so a resend is recognised whatever its meta."""

    model_config = STRICT

    event_id: str = Field(min_length=1, max_length=128)

    @field_validator("event_id")
    @classmethod
    def _no_control(cls, v: str) -> str:
        if _CONTROL.search(v):
            raise ValueError("event_id must not contain control characters")
        return v


class AlertMeta(EventIdOnly):
    sound_class: str = Field(min_length=1, max_length=64)
    score: float = Field(ge=0.0, le=1.0)
    detected_at: AwareDatetime
    clip_offset_s: float = Field(ge=0.0)
    firmware: str = Field(min_length=1, max_length=64)
    clip_sha256: str | None = None

    _detected_at_format = field_validator("detected_at", mode="before")(_rfc3339)
    _firmware_printable = field_validator("firmware")(_printable)

    @field_validator("score", "clip_offset_s", mode="before")
    @classmethod
    def _number_not_bool(cls, v: object) -> object:
        if isinstance(v, bool):
            raise ValueError("must be a number, not true/false")
        return v

    @field_validator("clip_sha256")
    @classmethod
    def _hex(cls, v: str | None) -> str | None:
        if v is not None and not _HEX64.match(v):
            raise ValueError("clip_sha256 must be 64 hexadecimal characters")
        return v.lower() if v else v


class AlertReceipt(BaseModel):
    alert_id: int
    duplicate: bool


class DeviceIn(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    serial: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
    hardware_model: str = Field(default="unknown", min_length=1, max_length=64)
    trial: str | None = None


class DeviceOut(BaseModel):
    id: int
    serial: str
    trial: str
    hardware_model: str
    firmware: str | None
    revoked: bool
    last_seen_at: dt.datetime | None
    clock_skew_s: float | None
    clock_skewed: bool
    home: str | None
    room: str | None
    listening_hours_7d: float


class DeviceCreated(DeviceOut):
    token: str


class AlertOut(BaseModel):
    id: int
    device: str
    trial: str
    home: str | None
    room: str | None
    event_id: str
    sound_class: str
    score: float
    detected_at: dt.datetime
    received_at: dt.datetime
    firmware: str
    clip_sha256: str
    clip_duration_s: float
    clip_offset_s: float
    state: str
    final_label: str | None
    clip_url: str
