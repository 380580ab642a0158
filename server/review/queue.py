"""The review queue: which clip a reviewer gets next, claims and their expiry, gold serving.

Pending alerts and blind second reviews come oldest first; the page and the API get a
``QueueItem``, which holds no personal data and nothing of any earlier verdict.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import zoneinfo
from collections.abc import Sequence
from dataclasses import dataclass

from sqlalchemy import ColumnElement, and_, exists, func, or_, select, update
from sqlalchemy.orm import Session, aliased

from server.auth.models import User
from server.db import utcnow
from server.devices.models import Alert, AlertState, Clip
from server.errors import Conflict, Forbidden, NotFound
from server.households.models import Consent, Home, Installation
from server.review.models import GoldAnswer, GoldCheck, Verdict
from server.trials.models import DEFAULT_CAUSES, Trial

REVIEW_STATES = (AlertState.pending, AlertState.second_review)
OPEN_STATES = (AlertState.pending, AlertState.second_review, AlertState.adjudication)
# Share of hand-outs that are gold checks, when one is available for the reviewer.
GOLD_SHARE = 0.05
# Keys for the cause list on the review page: the number row, left to right.
CAUSE_KEYS = "1234567890-="


class ClaimLost(Conflict):
    code = "claim_lost"


class NotInReview(Conflict):
    code = "not_in_review"


class SameReviewer(Forbidden):
    code = "same_reviewer"


class PrivateContent(Forbidden):
    code = "private_content"


# ---------------------------------------------------------------------------------------
# Keyed choices


def routing_key(secret: str) -> bytes:
    """The key for review routing, derived from the application secret."""
    return hmac.new(secret.encode(), b"trialhouse review routing", hashlib.sha256).digest()


def _unit_hash(key: bytes, message: str) -> float:
    digest = hmac.new(key, message.encode(), hashlib.sha256).digest()
    return int.from_bytes(digest[:8], "big") / 2.0**64


def chosen_for_second_review(key: bytes, alert_id: int, share: float) -> bool:
    """Deterministic per alert, unpredictable without the key; true for about ``share`` of ids."""
    return _unit_hash(key, f"second:{alert_id}") < share


def _gold_due(key: bytes, reviewer_id: int, progress: int, share: float) -> bool:
    return _unit_hash(key, f"gold:{reviewer_id}:{progress}") < share


# ---------------------------------------------------------------------------------------
# What the reviewer sees


@dataclass(frozen=True)
class Cause:
    code: str
    label: str
    key: str | None


@dataclass(frozen=True)
class QueueItem:
    """One clip as the review page shows it: no personal data, nothing of earlier verdicts."""

    alert_id: int
    trial_id: int
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
    clip_sha256: str
    causes: tuple[Cause, ...]


@dataclass(frozen=True)
class QueueView:
    current: QueueItem | None
    next: QueueItem | None


def trial_causes(trial: Trial) -> tuple[Cause, ...]:
    raw = trial.causes or DEFAULT_CAUSES
    return tuple(
        Cause(str(c["code"]), str(c.get("label", c["code"])), CAUSE_KEYS[i] if i < len(CAUSE_KEYS) else None)
        for i, c in enumerate(raw)
    )


def _zone(name: str) -> dt.tzinfo:
    try:
        return zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        return dt.UTC


def _items(session: Session, alerts: Sequence[Alert]) -> list[QueueItem]:
    if not alerts:
        return []
    trials = {
        t.id: t for t in session.scalars(select(Trial).where(Trial.id.in_({a.trial_id for a in alerts})))
    }
    home_ids = {a.home_id for a in alerts if a.home_id is not None}
    homes = (
        {h.id: h.code for h in session.scalars(select(Home).where(Home.id.in_(home_ids)))} if home_ids else {}
    )
    inst_ids = {a.installation_id for a in alerts if a.installation_id is not None}
    rooms = (
        {
            i: r
            for i, r in session.execute(
                select(Installation.id, Installation.room).where(Installation.id.in_(inst_ids))
            )
        }
        if inst_ids
        else {}
    )
    out = []
    for a in alerts:
        trial = trials[a.trial_id]
        tz = trial.timezone or "UTC"
        out.append(
            QueueItem(
                alert_id=a.id,
                trial_id=trial.id,
                trial_code=trial.code,
                sound_class=a.sound_class,
                score=a.score,
                detected_at=a.effective_at,
                detected_local=a.effective_at.astimezone(_zone(tz)),
                timezone=tz,
                home_code=homes.get(a.home_id) if a.home_id else None,
                room=rooms.get(a.installation_id) if a.installation_id else None,
                clip_offset_s=a.clip_offset_s,
                clip_duration_s=a.clip.duration_s,
                clip_sha256=a.clip.sha256,
                causes=trial_causes(trial),
            )
        )
    return out


def _item(session: Session, alert: Alert) -> QueueItem:
    return _items(session, [alert])[0]


# ---------------------------------------------------------------------------------------
# The queue


def _is_admin(user: User) -> bool:
    return user.role == "admin"


def _listening_allowed() -> ColumnElement[bool]:
    """The home's latest consent (if any) lets staff listen; the clip route refuses otherwise."""
    later = aliased(Consent)
    return ~exists().where(
        Consent.home_id == Alert.home_id,
        Consent.staff_may_listen.is_(False),
        ~exists().where(
            later.home_id == Consent.home_id,
            or_(
                later.recorded_at > Consent.recorded_at,
                and_(later.recorded_at == Consent.recorded_at, later.id > Consent.id),
            ),
        ),
    )


def _review_filter(
    reviewer: User, trial_id: int | None, sound_class: str | None
) -> list[ColumnElement[bool]]:
    conds: list[ColumnElement[bool]] = [
        ~exists().where(Clip.id == Alert.clip_id, Clip.erased_at.is_not(None)),
        _listening_allowed(),
    ]
    if not _is_admin(reviewer):
        conds.append(Alert.private_flag.is_(False))
    if trial_id is not None:
        conds.append(Alert.trial_id == trial_id)
    if sound_class:
        conds.append(Alert.sound_class == sound_class)
    return conds


def _not_reviewed_by(reviewer_id: int) -> ColumnElement[bool]:
    return ~exists().where(Verdict.alert_id == Alert.id, Verdict.reviewer_id == reviewer_id)


def _free(now: dt.datetime, reviewer_id: int) -> ColumnElement[bool]:
    return or_(
        Alert.claimed_by_id.is_(None), Alert.claim_expires_at < now, Alert.claimed_by_id == reviewer_id
    )


def _progress(session: Session, reviewer_id: int) -> int:
    verdicts = select(func.count()).select_from(Verdict).where(Verdict.reviewer_id == reviewer_id)
    golds = select(func.count()).select_from(GoldAnswer).where(GoldAnswer.reviewer_id == reviewer_id)
    row = session.execute(select(verdicts.scalar_subquery(), golds.scalar_subquery())).one()
    return int(row[0] or 0) + int(row[1] or 0)


def _gold_candidates(
    session: Session,
    reviewer: User,
    trial_id: int | None,
    sound_class: str | None,
    limit: int,
    exclude: Sequence[int] = (),
) -> list[Alert]:
    """Gold checks on decided alerts that this reviewer has neither answered nor reviewed, oldest first.

    Walks the (small) gold-check table in pages and only then looks at the alerts, so the
    planner never scans the decided alerts to find the few that are gold.
    """
    out: list[Alert] = []
    after = 0
    for _page in range(20):
        rows = session.execute(
            select(GoldCheck.id, GoldCheck.alert_id)
            .where(
                GoldCheck.id > after,
                ~exists().where(
                    GoldAnswer.gold_check_id == GoldCheck.id, GoldAnswer.reviewer_id == reviewer.id
                ),
                ~exists().where(Verdict.alert_id == GoldCheck.alert_id, Verdict.reviewer_id == reviewer.id),
            )
            .order_by(GoldCheck.id)
            .limit(50)
        ).all()
        if not rows:
            break
        after = rows[-1][0]
        ids = [a for _, a in rows if a not in exclude]
        if not ids:
            continue
        found = set(
            session.scalars(
                select(Alert.id).where(
                    Alert.id.in_(ids),
                    Alert.state == AlertState.final,
                    *_review_filter(reviewer, trial_id, sound_class),
                )
            )
        )
        out += [a for a in ids if a in found]
        if len(out) >= limit:
            break
    return [a for a in (session.get(Alert, i) for i in out[:limit]) if a is not None]


def _held_claims(session: Session, reviewer: User, now: dt.datetime) -> list[Alert]:
    return list(
        session.scalars(
            select(Alert)
            .where(
                Alert.claimed_by_id == reviewer.id,
                Alert.claim_expires_at >= now,
                Alert.state.in_(REVIEW_STATES),
            )
            .order_by(Alert.received_at, Alert.id)
            .execution_options(populate_existing=True)
        )
    )


def _matches(alert: Alert, reviewer: User, trial_id: int | None, sound_class: str | None) -> bool:
    if trial_id is not None and alert.trial_id != trial_id:
        return False
    if sound_class and alert.sound_class != sound_class:
        return False
    if alert.private_flag and not _is_admin(reviewer):
        return False
    return alert.clip.erased_at is None


def _claim_new(
    session: Session,
    reviewer: User,
    trial_id: int | None,
    sound_class: str | None,
    now: dt.datetime,
    expires: dt.datetime,
    exclude: set[int],
) -> Alert | None:
    """Claim the oldest free clip the reviewer may review; a lost race moves on to the next."""
    conds = _review_filter(reviewer, trial_id, sound_class)
    for _attempt in range(5):
        candidates: list[tuple[dt.datetime, int]] = []
        # One query per state, each an ordered walk of the (state, received_at) index.
        for state in REVIEW_STATES:
            q = (
                select(Alert.received_at, Alert.id)
                .where(Alert.state == state, _free(now, reviewer.id), *conds)
                .order_by(Alert.received_at, Alert.id)
                .limit(len(exclude) + 2)
            )
            if state == AlertState.second_review:
                q = q.where(_not_reviewed_by(reviewer.id))
            candidates += [(r, i) for r, i in session.execute(q) if i not in exclude]
        if not candidates:
            return None
        for _received, alert_id in sorted(candidates):
            res = session.execute(
                update(Alert)
                .where(Alert.id == alert_id, Alert.state.in_(REVIEW_STATES), _free(now, reviewer.id))
                .values(claimed_by_id=reviewer.id, claim_expires_at=expires)
                .execution_options(synchronize_session=False)
            )
            if res.rowcount == 1:  # type: ignore[attr-defined]
                return session.scalars(
                    select(Alert).where(Alert.id == alert_id).execution_options(populate_existing=True)
                ).one()
            exclude.add(alert_id)
    return None


def claim_next(
    session: Session,
    *,
    reviewer: User,
    trial_id: int | None = None,
    sound_class: str | None = None,
    claim_minutes: float = 5.0,
    key: bytes = b"",
    gold_share: float = GOLD_SHARE,
    now: dt.datetime | None = None,
) -> QueueView:
    """Hand the reviewer their current clip and the next one, claiming both.

    Pending alerts and blind second reviews (never to the first reviewer) come oldest first
    by receipt, within the optional trial and sound-class filter. A claim lasts
    ``claim_minutes``; an expired claim is free for anyone. The reviewer's claims are
    renewed, and claims outside the two clips handed out are released. Now and then (a keyed
    hash of the reviewer and their count of answers, below ``gold_share``) a gold check the
    reviewer has not seen takes a slot; it is not claimed, since many may answer it.
    """
    now = now or utcnow()
    expires = now + dt.timedelta(minutes=claim_minutes)
    held = [a for a in _held_claims(session, reviewer, now) if _matches(a, reviewer, trial_id, sound_class)]
    progress = _progress(session, reviewer.id)
    chosen: list[Alert] = []
    for slot in range(2):
        if gold_share > 0 and _gold_due(key, reviewer.id, progress + slot, gold_share):
            gold = _gold_candidates(session, reviewer, trial_id, sound_class, 1, [a.id for a in chosen])
            if gold:
                chosen.append(gold[0])
                continue
        if held:
            chosen.append(held.pop(0))
            continue
        new = _claim_new(session, reviewer, trial_id, sound_class, now, expires, {a.id for a in chosen})
        if new is None:
            break
        chosen.append(new)
    keep = [a.id for a in chosen if a.state in REVIEW_STATES]
    if keep:
        session.execute(
            update(Alert)
            .where(Alert.id.in_(keep))
            .values(claim_expires_at=expires)
            .execution_options(synchronize_session="evaluate")
        )
    # Claims live only on alerts in review (a verdict clears them), so the state index bounds this.
    release = update(Alert).where(Alert.state.in_(REVIEW_STATES), Alert.claimed_by_id == reviewer.id)
    if keep:
        release = release.where(Alert.id.not_in(keep))
    session.execute(
        release.values(claimed_by_id=None, claim_expires_at=None).execution_options(
            synchronize_session="fetch"
        )
    )
    session.flush()
    items = _items(session, chosen)
    return QueueView(items[0] if items else None, items[1] if len(items) > 1 else None)


def peek_queue(
    session: Session, *, reviewer: User, current_id: int, now: dt.datetime | None = None
) -> QueueItem | None:
    """The reviewer's other claimed clip (the one after ``current_id``), without changing anything."""
    now = now or utcnow()
    for a in _held_claims(session, reviewer, now):
        if a.id != current_id and (not a.private_flag or _is_admin(reviewer)):
            return _item(session, a)
    return None


def release_claims(session: Session, *, reviewer: User) -> int:
    """Give back every clip the reviewer holds (e.g. when they stop for the day)."""
    res = session.execute(
        update(Alert)
        .where(Alert.state.in_(REVIEW_STATES), Alert.claimed_by_id == reviewer.id)
        .values(claimed_by_id=None, claim_expires_at=None)
        .execution_options(synchronize_session="fetch")
    )
    return int(res.rowcount or 0)  # type: ignore[attr-defined]


def _gold_for(session: Session, alert_id: int) -> GoldCheck | None:
    return session.scalar(select(GoldCheck).where(GoldCheck.alert_id == alert_id))


def _gold_open_to(session: Session, gold: GoldCheck, reviewer: User) -> bool:
    answered = session.scalar(
        select(GoldAnswer.id).where(
            GoldAnswer.gold_check_id == gold.id, GoldAnswer.reviewer_id == reviewer.id
        )
    )
    reviewed = session.scalar(
        select(Verdict.id)
        .where(Verdict.alert_id == gold.alert_id, Verdict.reviewer_id == reviewer.id)
        .limit(1)
    )
    return answered is None and reviewed is None


def get_review_item(
    session: Session, *, reviewer: User, alert_id: int, now: dt.datetime | None = None
) -> QueueItem:
    """The clip as the reviewer may see it: they hold its claim, or it is a gold check open to them."""
    now = now or utcnow()
    alert = session.get(Alert, alert_id, populate_existing=True)
    if alert is None:
        raise NotFound(f"No alert has id {alert_id}.", code="unknown_alert")
    if alert.private_flag and not _is_admin(reviewer):
        raise PrivateContent("This clip was flagged as private content; only admins may listen to it.")
    if alert.state in REVIEW_STATES:
        live = alert.claim_expires_at is not None and alert.claim_expires_at >= now
        if alert.claimed_by_id == reviewer.id and live:
            return _item(session, alert)
        if alert.claimed_by_id not in (None, reviewer.id) and live:
            raise ClaimLost("Another reviewer is working on this clip; take the next one from the queue.")
        raise NotInReview("This clip is not handed out to you; take the next one from the queue.")
    gold = _gold_for(session, alert.id)
    if alert.state == AlertState.final and gold is not None and _gold_open_to(session, gold, reviewer):
        return _item(session, alert)
    raise NotInReview("This clip is not waiting for your review; take the next one from the queue.")


def queue_size(
    session: Session, *, reviewer: User, trial_id: int | None = None, sound_class: str | None = None
) -> int:
    """Clips this reviewer could be handed now (claimed ones included), for the queue page."""
    conds = _review_filter(reviewer, trial_id, sound_class)
    q = (
        select(func.count())
        .select_from(Alert)
        .where(
            Alert.state.in_(REVIEW_STATES),
            *conds,
            or_(Alert.state == AlertState.pending, _not_reviewed_by(reviewer.id)),
        )
    )
    return int(session.scalar(q) or 0)
