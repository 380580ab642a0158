"""Review: the queue and its claims, verdicts, blind second review, adjudication, gold checks.

Services take a session and plain values, flush and never commit. Pages and the JSON API
call the same functions; neither sees the first verdict while a blind second review is due.

How an alert moves (``Alert.state``)
    pending --first verdict--> final (method "single"), or second_review when the alert is
        chosen for a blind second review (a keyed hash of its id, below the trial's
        ``second_review_share``) or the verdict is "unsure".
    second_review --second verdict by another reviewer--> final ("agreed") when label, cause
        and resemblance all match and the label is not "unsure"; else adjudication.
    adjudication --adjudicator's verdict--> final ("adjudicated").
    A clip flagged as private content is heard by nobody but admins afterwards, so it skips
    the random second review; flagged while "unsure", it goes straight to adjudication.

Gold checks are served in the normal queue, in the same shape as any other clip. A gold
clip whose alert is already final gets a ``GoldAnswer`` only; one still in review also gets
its ordinary verdict.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass

from sqlalchemy import case, exists, func, select
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.db import utcnow
from server.devices.models import Alert, AlertState, Clip
from server.errors import Conflict, Forbidden, NotFound, ValidationFailed
from server.review.models import LABELS, RESEMBLANCE, GoldAnswer, GoldCheck, Verdict
from server.review.overview import review_overview
from server.review.queue import (
    REVIEW_STATES,
    ClaimLost,
    NotInReview,
    PrivateContent,
    QueueItem,
    SameReviewer,
    claim_next,
    drawn_for_second_review,
    gold_for,
    gold_open_to,
    hears_private,
    queue_item,
    queue_items,
    trial_causes,
)
from server.roles import allowed
from server.trials.models import Trial

__all__ = [
    "adjudicate",
    "claim_next",
    "flag_private",
    "list_private_clips_to_purge",
    "mark_gold",
    "record_verdict",
    "review_overview",
]

ROUND_FIRST, ROUND_SECOND, ROUND_ADJUDICATION = 1, 2, 3
MAX_NOTE_CHARS = 2000


@dataclass(frozen=True)
class Recorded:
    """What a reviewer gets back for a verdict: the same shape for every clip they are served."""

    alert_id: int
    label: str
    cause: str | None
    resemblance: str | None
    note: str | None
    private: bool
    recorded_at: dt.datetime


@dataclass(frozen=True)
class VerdictView:
    round: int
    reviewer_id: int
    reviewer_name: str
    label: str
    cause: str | None
    resemblance: str | None
    note: str | None
    created_at: dt.datetime


@dataclass(frozen=True)
class AdjudicationCase:
    item: QueueItem
    verdicts: tuple[VerdictView, ...]
    private: bool


# ---------------------------------------------------------------------------------------
# Verdicts


def _clean(
    label: str, cause: str | None, resemblance: str | None, note: str | None, trial: Trial
) -> tuple[str, str | None, str | None, str | None]:
    errors: dict[str, str] = {}
    if label not in LABELS:
        errors["label"] = f"Choose one of: {', '.join(LABELS)}."
    cause = (cause or "").strip() or None
    resemblance = (resemblance or "").strip() or None
    note = (note or "").strip() or None
    codes = [c.code for c in trial_causes(trial)]
    if label == "false_alarm":
        if cause is None:
            errors["cause"] = "A false alarm needs a cause."
        elif cause not in codes:
            errors["cause"] = f"'{cause}' is not in this trial's list of causes."
        if resemblance is None:
            errors["resemblance"] = "Say whether the sound resembles the target or is unrelated."
        elif resemblance not in RESEMBLANCE:
            errors["resemblance"] = f"Choose one of: {', '.join(RESEMBLANCE)}."
    elif label in LABELS:
        if cause is not None:
            errors["cause"] = "Only a false alarm takes a cause."
        if resemblance is not None:
            errors["resemblance"] = "Only a false alarm takes a resemblance grade."
    if note is not None and len(note) > MAX_NOTE_CHARS:
        errors["note"] = f"Keep the note under {MAX_NOTE_CHARS} characters."
    if errors:
        first = next(iter(errors))
        raise ValidationFailed(errors[first], errors, field=first)
    return label, cause, resemblance, note


def _lock_alert(session: Session, alert_id: int) -> Alert:
    # Lock the row alone (FOR UPDATE cannot reach the eagerly joined device and clip), then reload.
    found = session.scalar(select(Alert.id).where(Alert.id == alert_id).with_for_update())
    alert = session.get(Alert, alert_id, populate_existing=True) if found is not None else None
    if alert is None:
        raise NotFound(f"No alert has id {alert_id}.", code="unknown_alert")
    return alert


def _finalise(alert: Alert, v: Verdict, method: str, now: dt.datetime) -> None:
    alert.final_label = v.label
    alert.final_cause = v.cause
    alert.final_resemblance = v.resemblance
    alert.final_method = method
    alert.finalized_at = now
    alert.state = AlertState.final


def _same(a: Verdict, b: Verdict) -> bool:
    return (a.label, a.cause, a.resemblance) == (b.label, b.cause, b.resemblance)


def _answer_gold(
    session: Session, gold: GoldCheck, reviewer: User, label: str, cause: str | None, now: dt.datetime
) -> GoldAnswer:
    # A gold false alarm with a known cause is answered right only with that cause.
    correct = label == gold.expected_label and (
        gold.expected_label != "false_alarm" or gold.expected_cause is None or cause == gold.expected_cause
    )
    answer = GoldAnswer(
        gold_check_id=gold.id,
        reviewer_id=reviewer.id,
        label=label,
        cause=cause,
        correct=correct,
        created_at=now,
    )
    session.add(answer)
    return answer


def record_verdict(
    session: Session,
    *,
    reviewer: User,
    alert_id: int,
    label: str,
    cause: str | None = None,
    resemblance: str | None = None,
    note: str | None = None,
    private: bool = False,
    key: bytes = b"",
    now: dt.datetime | None = None,
) -> Recorded:
    """Record a reviewer's verdict and move the alert on (see the module docstring).

    Refuses: unknown alert (404), a clip another reviewer holds a live claim on (409
    ``claim_lost``), the first reviewer giving the second verdict (403 ``same_reviewer``),
    an alert not waiting for review (409 ``not_in_review``), a private clip for non-admins
    (403 ``private_content``), and a verdict that breaks the label rules (422).
    """
    now = now or utcnow()
    alert = _lock_alert(session, alert_id)
    trial = session.get(Trial, alert.trial_id)
    assert trial is not None
    label, cause, resemblance, note = _clean(label, cause, resemblance, note, trial)
    if alert.private_flag and not hears_private(reviewer):
        raise PrivateContent("This clip was flagged as private content; only admins may listen to it.")
    gold = gold_for(session, alert.id)

    if alert.state not in REVIEW_STATES:
        if alert.state == AlertState.final and gold is not None and gold_open_to(session, gold, reviewer):
            _answer_gold(session, gold, reviewer, label, cause, now)
            if private:
                _flag_private(session, alert, reviewer)
            session.flush()
            return Recorded(alert.id, label, cause, resemblance, note, private or alert.private_flag, now)
        raise NotInReview(f"Alert {alert.id} is not waiting for a review verdict.")

    if (
        alert.claimed_by_id not in (None, reviewer.id)
        and alert.claim_expires_at is not None
        and alert.claim_expires_at >= now
    ):
        raise ClaimLost(
            "Another reviewer took this clip after your claim expired; your verdict was not saved."
        )
    earlier = list(
        session.scalars(select(Verdict).where(Verdict.alert_id == alert.id).order_by(Verdict.round))
    )
    round_ = ROUND_FIRST if alert.state == AlertState.pending else ROUND_SECOND
    if round_ == ROUND_SECOND and any(v.reviewer_id == reviewer.id for v in earlier):
        raise SameReviewer(
            "You gave the first verdict on this clip; a different reviewer must give the second."
        )

    gold_open = gold is not None and gold_open_to(session, gold, reviewer)
    verdict = Verdict(
        alert_id=alert.id,
        reviewer_id=reviewer.id,
        round=round_,
        label=label,
        cause=cause,
        resemblance=resemblance,
        note=note,
        created_at=now,
    )
    session.add(verdict)
    if gold is not None and gold_open:
        _answer_gold(session, gold, reviewer, label, cause, now)
    if private:
        _flag_private(session, alert, reviewer)

    if round_ == ROUND_FIRST:
        share = trial.second_review_share if trial.second_review_share is not None else 0.10
        verdict.random_draw = drawn_for_second_review(key, alert, share)
        if alert.private_flag:
            alert.needs_second_review = False
            if label == "unsure":
                alert.state = AlertState.adjudication
            else:
                _finalise(alert, verdict, "single", now)
        elif label == "unsure" or verdict.random_draw:
            alert.needs_second_review = True
            alert.state = AlertState.second_review
        else:
            _finalise(alert, verdict, "single", now)
    else:
        first = next(v for v in earlier if v.round == ROUND_FIRST)
        if _same(first, verdict) and label != "unsure":
            _finalise(alert, verdict, "agreed", now)
        else:
            alert.state = AlertState.adjudication
    alert.claimed_by_id = None
    alert.claim_expires_at = None
    session.flush()
    return Recorded(alert.id, label, cause, resemblance, note, alert.private_flag, now)


def _flag_private(session: Session, alert: Alert, user: User) -> None:
    if alert.private_flag:
        return
    alert.private_flag = True
    alert.private_flagged_by_id = user.id
    # Whoever holds it lets go: from now on only an admin may be handed this clip.
    alert.claimed_by_id = None
    alert.claim_expires_at = None
    audit.record(session, user, "clip.flag_private", "alert", alert.id, {"clip_id": alert.clip_id})


def flag_private(session: Session, *, user: User, alert_id: int) -> Alert:
    """Mark a clip as private content: only admins hear it from now on; the next purge removes it."""
    alert = _lock_alert(session, alert_id)
    _flag_private(session, alert, user)
    session.flush()
    return alert


def list_private_clips_to_purge(session: Session) -> list[Clip]:
    """Clips of any alert flagged as private content that are still in the store.

    For the retention run: delete the file, then mark the clip erased (``erased_reason``
    "private_content") and remove its cached review images (``images_cache.forget``).
    """
    q = (
        select(Clip)
        .where(
            Clip.erased_at.is_(None), exists().where(Alert.clip_id == Clip.id, Alert.private_flag.is_(True))
        )
        .order_by(Clip.id)
    )
    return list(session.scalars(q))


# ---------------------------------------------------------------------------------------
# Adjudication


def can_adjudicate(user: User) -> bool:
    """A role with "review.adjudicate" settles with the adjudicator permission, or without it if it
    also holds "review.adjudicate.always" (the role matrix)."""
    return allowed(user.role, "review.adjudicate") and (
        user.is_adjudicator or allowed(user.role, "review.adjudicate.always")
    )


def _settles_own(user: User) -> bool:
    """Whether ``user`` may settle a clip she gave one of the verdicts on (so a small team is never stuck)."""
    return allowed(user.role, "review.adjudicate.own")


def _verdict_views(session: Session, alert_ids: Sequence[int]) -> dict[int, list[VerdictView]]:
    out: dict[int, list[VerdictView]] = {i: [] for i in alert_ids}
    if not alert_ids:
        return out
    rows = session.execute(
        select(Verdict, User.name)
        .join(User, User.id == Verdict.reviewer_id)
        .where(Verdict.alert_id.in_(list(alert_ids)))
        .order_by(Verdict.alert_id, Verdict.round)
    )
    for v, name in rows:
        out[v.alert_id].append(
            VerdictView(v.round, v.reviewer_id, name, v.label, v.cause, v.resemblance, v.note, v.created_at)
        )
    return out


def _check_adjudicator(user: User) -> None:
    if not can_adjudicate(user):
        raise Forbidden(
            "Only admins and reviewers with the adjudicator permission settle disagreements.",
            code="not_adjudicator",
        )


def list_adjudications(
    session: Session, *, adjudicator: User, trial_id: int | None = None, limit: int = 200
) -> list[AdjudicationCase]:
    """Alerts whose reviewers disagreed (or stayed unsure), oldest first, with both verdicts."""
    _check_adjudicator(adjudicator)
    q = select(Alert).where(Alert.state == AlertState.adjudication).order_by(Alert.received_at, Alert.id)
    if trial_id is not None:
        q = q.where(Alert.trial_id == trial_id)
    if not hears_private(adjudicator):
        q = q.where(Alert.private_flag.is_(False))
    if not _settles_own(adjudicator):
        # Never her own clips: a reviewer who gave one of the verdicts may not settle them.
        own = select(Verdict.alert_id).where(Verdict.reviewer_id == adjudicator.id)
        q = q.where(Alert.id.not_in(own))
    alerts = list(session.scalars(q.limit(limit)))
    views = _verdict_views(session, [a.id for a in alerts])
    return [
        AdjudicationCase(item, tuple(views[a.id]), a.private_flag)
        for a, item in zip(alerts, queue_items(session, alerts), strict=True)
    ]


def get_adjudication(session: Session, *, adjudicator: User, alert_id: int) -> AdjudicationCase:
    _check_adjudicator(adjudicator)
    alert = session.get(Alert, alert_id)
    if alert is None:
        raise NotFound(f"No alert has id {alert_id}.", code="unknown_alert")
    if alert.state != AlertState.adjudication:
        raise NotInReview(
            f"Alert {alert_id} is not waiting for adjudication.", code="not_awaiting_adjudication"
        )
    if alert.private_flag and not hears_private(adjudicator):
        raise PrivateContent("This clip was flagged as private content; only admins may listen to it.")
    if (
        not _settles_own(adjudicator)
        and session.scalar(
            select(Verdict.id)
            .where(Verdict.alert_id == alert.id, Verdict.reviewer_id == adjudicator.id)
            .limit(1)
        )
        is not None
    ):
        raise SameReviewer("You gave one of the verdicts on this clip; another adjudicator must settle it.")
    return AdjudicationCase(
        queue_item(session, alert), tuple(_verdict_views(session, [alert.id])[alert.id]), alert.private_flag
    )


def adjudicate(
    session: Session,
    *,
    adjudicator: User,
    alert_id: int,
    label: str,
    cause: str | None = None,
    resemblance: str | None = None,
    note: str | None = None,
    now: dt.datetime | None = None,
) -> Verdict:
    """Settle a disagreement; the adjudicator's verdict becomes final ("adjudicated").

    Only admins and reviewers with ``is_adjudicator``; a reviewer who gave one of the two
    verdicts may not settle it (admins may, so a small team is never stuck).
    """
    now = now or utcnow()
    _check_adjudicator(adjudicator)
    alert = _lock_alert(session, alert_id)
    trial = session.get(Trial, alert.trial_id)
    assert trial is not None
    label, cause, resemblance, note = _clean(label, cause, resemblance, note, trial)
    if alert.state != AlertState.adjudication:
        raise NotInReview(
            f"Alert {alert_id} is not waiting for adjudication.", code="not_awaiting_adjudication"
        )
    if alert.private_flag and not hears_private(adjudicator):
        raise PrivateContent("This clip was flagged as private content; only admins may listen to it.")
    earlier = list(session.scalars(select(Verdict).where(Verdict.alert_id == alert.id)))
    if not _settles_own(adjudicator) and any(v.reviewer_id == adjudicator.id for v in earlier):
        raise SameReviewer("You gave one of the verdicts on this clip; another adjudicator must settle it.")
    verdict = Verdict(
        alert_id=alert.id,
        reviewer_id=adjudicator.id,
        round=ROUND_ADJUDICATION,
        label=label,
        cause=cause,
        resemblance=resemblance,
        note=note,
        created_at=now,
    )
    session.add(verdict)
    _finalise(alert, verdict, "adjudicated", now)
    alert.claimed_by_id = None
    alert.claim_expires_at = None
    session.flush()
    audit.record(
        session,
        adjudicator,
        "review.adjudicate",
        "alert",
        alert.id,
        {"label": label, "cause": cause, "earlier": [v.label for v in earlier]},
    )
    return verdict


# ---------------------------------------------------------------------------------------
# Gold checks


@dataclass(frozen=True)
class GoldRow:
    id: int
    alert_id: int
    trial_code: str
    sound_class: str
    expected_label: str
    expected_cause: str | None
    answers: int
    correct: int
    created_at: dt.datetime


def mark_gold(
    session: Session, *, user: User, alert_id: int, expected_label: str, expected_cause: str | None = None
) -> GoldCheck:
    """Record a clip's known answer, to be served unannounced to reviewers."""
    alert = session.get(Alert, alert_id)
    if alert is None:
        raise NotFound(f"No alert has id {alert_id}.", code="unknown_alert")
    trial = session.get(Trial, alert.trial_id)
    assert trial is not None
    errors: dict[str, str] = {}
    if expected_label not in LABELS:
        errors["expected_label"] = f"Choose one of: {', '.join(LABELS)}."
    expected_cause = (expected_cause or "").strip() or None
    if expected_cause is not None:
        if expected_label != "false_alarm":
            errors["expected_cause"] = "Only a false alarm takes a cause."
        elif expected_cause not in [c.code for c in trial_causes(trial)]:
            errors["expected_cause"] = f"'{expected_cause}' is not in this trial's list of causes."
    if errors:
        first = next(iter(errors))
        raise ValidationFailed(errors[first], errors, field=first)
    if gold_for(session, alert_id) is not None:
        raise Conflict(f"Alert {alert_id} is already a gold check.", code="gold_exists")
    gold = GoldCheck(
        alert_id=alert_id, expected_label=expected_label, expected_cause=expected_cause, created_by_id=user.id
    )
    session.add(gold)
    session.flush()
    audit.record(session, user, "review.gold_mark", "alert", alert_id, {"expected_label": expected_label})
    return gold


def list_gold_checks(session: Session, *, trial_id: int | None = None) -> list[GoldRow]:
    counts = {
        gid: (int(n), int(ok or 0))
        for gid, n, ok in session.execute(
            select(
                GoldAnswer.gold_check_id,
                func.count(),
                func.sum(case((GoldAnswer.correct.is_(True), 1), else_=0)),
            ).group_by(GoldAnswer.gold_check_id)
        )
    }
    q = (
        select(GoldCheck, Alert.sound_class, Trial.code)
        .join(Alert, Alert.id == GoldCheck.alert_id)
        .join(Trial, Trial.id == Alert.trial_id)
        .order_by(GoldCheck.id.desc())
    )
    if trial_id is not None:
        q = q.where(Alert.trial_id == trial_id)
    return [
        GoldRow(
            g.id,
            g.alert_id,
            code,
            sc,
            g.expected_label,
            g.expected_cause,
            *counts.get(g.id, (0, 0)),
            g.created_at,
        )
        for g, sc, code in session.execute(q)
    ]
