"""JSON bodies of the register API. Contact details appear only in ContactIn / ContactOut."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any

from pydantic import AwareDatetime, BaseModel, BeforeValidator, ConfigDict, Field

from server.devices.schemas import json_date, json_datetime


class Strict(BaseModel):
    # No coercion: an epoch number is not a time, false is not 0, "3" is not 3, NaN is refused.
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)


# Times and dates arrive as JSON strings (RFC 3339 / ISO 8601) and nothing else.
JsonDateTime = Annotated[AwareDatetime, BeforeValidator(json_datetime)]
JsonDate = Annotated[dt.date, BeforeValidator(json_date)]


class HomeIn(Strict):
    trial: str | None = None
    code: str | None = None
    attributes: dict[str, Any] = Field(default_factory=dict)
    note: str | None = None
    at: JsonDateTime | None = None  # when the household entered the register (default now)


class HomePatch(Strict):
    # Only the given keys change; null removes an answer.
    attributes: dict[str, Any]


class HomeOut(BaseModel):
    code: str
    trial: str
    state: str
    state_changed_at: dt.datetime
    attributes: dict[str, Any]
    devices_installed: int
    consented: bool
    erased: bool


class TransitionIn(Strict):
    to_state: str
    note: str | None = None
    at: JsonDateTime | None = None
    # On a pause: do the devices keep listening (time still counts as monitored)?
    listening: bool = True


class TimelineOut(BaseModel):
    at: dt.datetime
    from_state: str | None
    to_state: str
    author: str
    note: str | None = None
    listening: bool


class TransitionOut(BaseModel):
    home: HomeOut
    warnings: list[str]
    closed_installations: list[int]


class ConsentIn(Strict):
    form_version: str
    consented_on: JsonDate
    staff_may_listen: bool = True
    retention_days: int = Field(90, ge=1, le=3650)
    mark_consented: bool = False
    at: JsonDateTime | None = None  # time of the move to consented (default now)


class ConsentOut(BaseModel):
    form_version: str
    consented_on: dt.date
    staff_may_listen: bool
    retention_days: int
    recorded_at: dt.datetime


class ContactIn(Strict):
    names: str = ""
    address: str = ""
    phone: str = ""
    email: str = ""
    access_notes: str = ""


class ContactOut(ContactIn):
    code: str
    updated_at: dt.datetime | None = None


class InstallationIn(Strict):
    device: str  # serial
    home: str  # code
    room: str
    installed_at: JsonDateTime
    move: bool = False


class InstallationPatch(Strict):
    installed_at: JsonDateTime | None = None
    removed_at: JsonDateTime | None = None
    reopen: bool = False  # clear removed_at
    room: str | None = None


class RemovalIn(Strict):
    removed_at: JsonDateTime


class InstallationOut(BaseModel):
    id: int
    device: str
    home: str
    room: str
    installed_at: dt.datetime
    removed_at: dt.datetime | None
    last_seen_at: dt.datetime | None = None


class InstallationResult(BaseModel):
    installation: InstallationOut
    closed: InstallationOut | None = None
    alerts_reattributed: int


class AttributeIn(Strict):
    trial: str | None = None
    key: str
    label: str
    kind: str
    options: list[str] = Field(default_factory=list)
    min_value: int | None = None
    max_value: int | None = None


class AttributeOut(BaseModel):
    key: str
    label: str
    kind: str
    options: list[str]
    min_value: int | None
    max_value: int | None


class ErasurePlanOut(BaseModel):
    code: str
    will_erase: list[str]
    will_keep: list[str]
    clips_to_delete: int
    alerts_kept: int
    ticket: str
    expires_in_s: int


class ErasureIn(Strict):
    ticket: str
    confirm_code: str
    note: str | None = None


class ErasureOut(BaseModel):
    code: str
    complete: bool
    contact_erased: bool
    clips_deleted: int
    clips_shared_kept: int
    alerts_kept: int


class ImportProblemOut(BaseModel):
    row: int
    code: str
    column: str
    problem: str


class ImportOut(BaseModel):
    rows: int
    created: list[str]
