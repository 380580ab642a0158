"""Review API bodies. What a reviewer receives never names an earlier verdict or a gold check."""

from __future__ import annotations

import datetime as dt
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from server.review.queue import QueueItem, QueueView
from server.review.service import AdjudicationCase, Recorded

STRICT = ConfigDict(extra="forbid", str_strip_whitespace=True, strict=True, allow_inf_nan=False)


class CauseOut(BaseModel):
    code: str
    label: str
    key: str | None


class QueueItemOut(BaseModel):
    alert_id: int
    trial_code: str
    sound_class: str
    score: float
    detected_at: dt.datetime
    detected_local: dt.datetime
    timezone: str
    home_code: str | None
    room: str | None
    clip_offset_s: float
    clip_duration_s: float
    audio_url: str
    waveform_url: str
    spectrogram_url: str
    images_meta_url: str
    causes: list[CauseOut]

    @classmethod
    def of(cls, item: QueueItem) -> QueueItemOut:
        base = f"/review/images/{item.alert_id}"
        return cls(
            alert_id=item.alert_id,
            trial_code=item.trial_code,
            sound_class=item.sound_class,
            score=item.score,
            detected_at=item.detected_at,
            detected_local=item.detected_local,
            timezone=item.timezone,
            home_code=item.home_code,
            room=item.room,
            clip_offset_s=item.clip_offset_s,
            clip_duration_s=item.clip_duration_s,
            audio_url=f"/clips/{item.alert_id}/audio",
            waveform_url=f"{base}/waveform.png",
            spectrogram_url=f"{base}/spectrogram.png",
            images_meta_url=f"{base}/meta.json",
            causes=[CauseOut(code=c.code, label=c.label, key=c.key) for c in item.causes],
        )


class QueueOut(BaseModel):
    current: QueueItemOut | None
    next: QueueItemOut | None

    @classmethod
    def of(cls, view: QueueView) -> QueueOut:
        return cls(
            current=QueueItemOut.of(view.current) if view.current else None,
            next=QueueItemOut.of(view.next) if view.next else None,
        )


class ClaimIn(BaseModel):
    model_config = STRICT

    trial: str | None = Field(default=None, max_length=40, description="Trial code to work on")
    sound_class: str | None = Field(default=None, max_length=64)


class VerdictIn(BaseModel):
    model_config = STRICT

    label: str = Field(max_length=20, description="confirmed | false_alarm | unsure | unusable")
    cause: str | None = Field(default=None, max_length=40, description="A cause code; false alarms only")
    resemblance: str | None = Field(
        default=None, max_length=20, description="resembles | unrelated; false alarms only"
    )
    note: str | None = Field(default=None, max_length=4000)
    private: bool = Field(default=False, description="The clip holds private content")


class VerdictOut(BaseModel):
    alert_id: int
    label: str
    cause: str | None
    resemblance: str | None
    note: str | None
    private: bool
    recorded_at: dt.datetime

    @classmethod
    def of(cls, r: Recorded) -> VerdictOut:
        return cls(
            alert_id=r.alert_id,
            label=r.label,
            cause=r.cause,
            resemblance=r.resemblance,
            note=r.note,
            private=r.private,
            recorded_at=r.recorded_at,
        )


class AdjudicationIn(BaseModel):
    model_config = STRICT

    label: str = Field(max_length=20)
    cause: str | None = Field(default=None, max_length=40)
    resemblance: str | None = Field(default=None, max_length=20)
    note: str | None = Field(default=None, max_length=4000)


class EarlierVerdictOut(BaseModel):
    round: int
    reviewer: str
    label: str
    cause: str | None
    resemblance: str | None
    note: str | None
    created_at: dt.datetime


class AdjudicationCaseOut(BaseModel):
    item: QueueItemOut
    verdicts: list[EarlierVerdictOut]
    private: bool

    @classmethod
    def of(cls, case: AdjudicationCase) -> AdjudicationCaseOut:
        return cls(
            item=QueueItemOut.of(case.item),
            private=case.private,
            verdicts=[
                EarlierVerdictOut(
                    round=v.round,
                    reviewer=v.reviewer_name,
                    label=v.label,
                    cause=v.cause,
                    resemblance=v.resemblance,
                    note=v.note,
                    created_at=v.created_at,
                )
                for v in case.verdicts
            ],
        )


class FinalOut(BaseModel):
    alert_id: int
    final_label: str | None
    final_cause: str | None
    final_resemblance: str | None
    final_method: str | None


class GoldCheckIn(BaseModel):
    model_config = STRICT

    alert_id: int
    expected_label: str = Field(max_length=20)
    expected_cause: str | None = Field(default=None, max_length=40)


class GoldCheckOut(BaseModel):
    id: int
    alert_id: int
    expected_label: str
    expected_cause: str | None
    answers: int = 0
    correct: int = 0
    created_at: dt.datetime


def as_dict(model: BaseModel) -> dict[str, Any]:
    return model.model_dump(mode="json")
