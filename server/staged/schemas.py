"""JSON bodies of the staged-event API."""

from __future__ import annotations

import datetime as dt

from pydantic import BaseModel

from server.households.schemas import JsonDateTime, Strict


class StagedEventIn(Strict):
    home: str
    sound_class: str
    started_at: JsonDateTime
    ended_at: JsonDateTime
    source: str
    level_db: float | None = None


class StagedEventOut(BaseModel):
    id: int
    trial: str
    home: str
    sound_class: str
    started_at: dt.datetime
    ended_at: dt.datetime
    source: str
    level_db: float | None
