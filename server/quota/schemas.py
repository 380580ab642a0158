"""JSON bodies of the quota API."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel

from server.households.schemas import Strict


class TargetIn(Strict):
    trial: str | None = None
    attribute_key: str | None = None
    value: Any = None
    min_count: int | None = None
    max_count: int | None = None
    label: str = ""


class TargetOut(BaseModel):
    id: int
    label: str
    attribute_key: str | None
    value: Any
    min_count: int | None
    max_count: int | None
    count: int
    status: str
    shortfall: int
    excess: int
    homes: list[str]


class SuggestionOut(BaseModel):
    code: str
    state: str
    helps: list[str]


class QuotaOut(BaseModel):
    trial: str
    counting_states: list[str]
    counted: int
    by_state: dict[str, int]
    targets: list[TargetOut]
    suggestions: list[SuggestionOut]
    remaining_after: dict[str, int]
    rule: str
    warnings: list[str]


class QuotaStatesIn(Strict):
    trial: str | None = None
    states: list[str]
