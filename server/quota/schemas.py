"""JSON bodies of the quota API, and the quota view as one (for the API and `quota show --json`)."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel

from server.households.schemas import Strict
from server.quota.service import QuotaView


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


def quota_out(view: QuotaView) -> QuotaOut:
    r = view.report
    labels = {s.target.id: s.target.label for s in r.targets}
    warnings = [
        f"'{labels[tid]}' is below its minimum after "
        + ", ".join(f"{d.code} left on {d.at:%Y-%m-%d}" for d in ds)
        + "."
        for tid, ds in view.departures.items()
    ]
    return QuotaOut(
        trial=view.trial.code,
        counting_states=list(r.counting_states),
        counted=r.counted,
        by_state=dict(r.by_state),
        targets=[
            TargetOut(
                id=s.target.id,
                label=s.target.label,
                attribute_key=s.target.attribute_key,
                value=s.target.value,
                min_count=s.target.min_count,
                max_count=s.target.max_count,
                count=s.count,
                status=s.status,
                shortfall=s.shortfall,
                excess=s.excess,
                homes=list(s.homes),
            )
            for s in r.targets
        ],
        suggestions=[
            SuggestionOut(code=s.code, state=s.state, helps=view.suggestion_labels(s)) for s in r.suggestions
        ],
        remaining_after={labels[k]: v for k, v in r.remaining_after.items()},
        rule=view.rule,
        warnings=warnings,
    )


class QuotaStatesIn(Strict):
    trial: str | None = None
    states: list[str]
