"""The review queue: which clip a reviewer gets next, claims and their expiry, gold serving.

Pending alerts and blind second reviews come oldest first; the page and the API get a
``QueueItem``, which holds no personal data and nothing of any earlier verdict.
"""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
import hmac
import zoneinfo
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, cast

from sqlalchemy import (
    BindParameter,
    ColumnElement,
    CursorResult,
    Result,
    Select,
    Update,
    and_,
    bindparam,
    exists,
    func,
    or_,
    select,
    update,
)
from sqlalchemy.orm import Session, aliased, lazyload

from server.auth.models import User
from server.db import utcnow
from server.devices.models import Alert, AlertState, Clip
from server.errors import Conflict, Forbidden, NotFound
from server.households.models import Consent, Home
from server.installations.models import Installation
from server.review.models import GoldAnswer, GoldCheck, Verdict
from server.roles import allowed
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


def drawn_for_second_review(key: bytes, alert: Alert, share: float) -> bool:
    """The random draw for a first verdict: the keyed hash chose the alert and it is not private.

    Recorded on the first verdict (``Verdict.random_draw``) whatever its label, so that the
    agreement figures can use the random sample alone: "unsure" verdicts are sent to a second
    reviewer as well, and pooling them with the draw would bias the agreement measured.
    A private clip is heard by admins only, so it is never part of the sample.
    """
    return not alert.private_flag and chosen_for_second_review(key, alert.id, share)


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


def queue_items(session: Session, alerts: Sequence[Alert]) -> list[QueueItem]:
    if not alerts:
        return []
    trials = {i: session.get(Trial, i) for i in {a.trial_id for a in alerts}}  # usually in the identity map
    places: dict[int, tuple[str | None, str | None]] = {}
    if any(a.home_id is not None or a.installation_id is not None for a in alerts):
        q = (
            select(Alert.id, Home.code, Installation.room)
            .outerjoin(Home, Home.id == Alert.home_id)
            .outerjoin(Installation, Installation.id == Alert.installation_id)
            .where(Alert.id.in_([a.id for a in alerts]))
        )
        places = {i: (code, room) for i, code, room in session.execute(q)}
    out = []
    for a in alerts:
        trial = trials[a.trial_id]
        assert trial is not None
        tz = trial.timezone or "UTC"
        home_code, room = places.get(a.id, (None, None))
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
                home_code=home_code,
                room=room,
                clip_offset_s=a.clip_offset_s,
                clip_duration_s=a.clip.duration_s,
                clip_sha256=a.clip.sha256,
                causes=trial_causes(trial),
            )
        )
    return out


def queue_item(session: Session, alert: Alert) -> QueueItem:
    return queue_items(session, [alert])[0]


# ---------------------------------------------------------------------------------------
# The queue


def hears_private(user: User) -> bool:
    """Whether ``user``'s role may be handed clips flagged as private content (the role matrix)."""
    return allowed(user.role, "clips.private")


@functools.cache
def _listening_allowed() -> ColumnElement[bool]:
    """The home's latest consent (if any) lets staff listen; the clip route refuses otherwise.

    Built once: the expression has no parameters, and building it costs more than running it.
    """
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


@functools.cache
def _clip_present() -> ColumnElement[bool]:
    # A scalar subquery, looked up by primary key for each alert walked: as NOT EXISTS,
    # PostgreSQL turns it into an anti-join that reads the whole clip table first.
    return select(Clip.erased_at).where(Clip.id == Alert.clip_id).scalar_subquery().is_(None)


@functools.cache
def _not_private() -> ColumnElement[bool]:
    return Alert.private_flag.is_(False)


def _review_filter(
    reviewer: User, trial_id: int | None, sound_class: str | None
) -> list[ColumnElement[bool]]:
    conds: list[ColumnElement[bool]] = [_clip_present(), _listening_allowed()]
    if not hears_private(reviewer):
        conds.append(_not_private())
    if trial_id is not None:
        conds.append(Alert.trial_id == trial_id)
    if sound_class:
        conds.append(Alert.sound_class == sound_class)
    return conds


def _not_reviewed_by(reviewer_id: int) -> ColumnElement[bool]:
    return ~exists().where(Verdict.alert_id == Alert.id, Verdict.reviewer_id == reviewer_id)


@functools.cache
def _progress_stmt() -> Select[int, int]:
    rid: BindParameter[int] = bindparam("q_rid")
    verdicts = select(func.count()).select_from(Verdict).where(Verdict.reviewer_id == rid)
    golds = select(func.count()).select_from(GoldAnswer).where(GoldAnswer.reviewer_id == rid)
    return select(verdicts.scalar_subquery(), golds.scalar_subquery())


def _progress(session: Session, reviewer_id: int) -> int:
    row = session.execute(_progress_stmt(), {"q_rid": reviewer_id}).one()
    return int(row[0] or 0) + int(row[1] or 0)


@functools.cache
def _gold_page_stmt() -> Select[int, int]:
    rid: BindParameter[int] = bindparam("q_rid")
    return (
        select(GoldCheck.id, GoldCheck.alert_id)
        .where(
            GoldCheck.id > bindparam("q_after"),
            ~exists().where(GoldAnswer.gold_check_id == GoldCheck.id, GoldAnswer.reviewer_id == rid),
            ~exists().where(Verdict.alert_id == GoldCheck.alert_id, Verdict.reviewer_id == rid),
        )
        .order_by(GoldCheck.id)
        .limit(50)
    )


@functools.cache
def _gold_alerts_stmt(with_private: bool, by_trial: bool, by_sound: bool) -> Select[int]:
    q = select(Alert.id).where(
        Alert.id.in_(bindparam("q_ids", expanding=True)),
        Alert.state == AlertState.final,
        _clip_present(),
        _listening_allowed(),
    )
    if not with_private:
        q = q.where(_not_private())
    if by_trial:
        q = q.where(Alert.trial_id == bindparam("q_trial_id"))
    if by_sound:
        q = q.where(Alert.sound_class == bindparam("q_sound_class"))
    return q


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
    out: list[int] = []
    after = 0
    alerts_stmt = _gold_alerts_stmt(hears_private(reviewer), trial_id is not None, bool(sound_class))
    for _page in range(20):
        rows = session.execute(_gold_page_stmt(), {"q_rid": reviewer.id, "q_after": after}).all()
        if not rows:
            break
        after = rows[-1][0]
        ids = [a for _, a in rows if a not in exclude]
        if not ids:
            continue
        params = {"q_ids": ids, "q_trial_id": trial_id, "q_sound_class": sound_class}
        found = set(session.scalars(alerts_stmt, params))
        out += [a for a in ids if a in found]
        if len(out) >= limit:
            break
    return [a for a in (session.get(Alert, i) for i in out[:limit]) if a is not None]


@functools.cache
def _held_stmt() -> Select[Alert]:
    return (
        select(Alert)
        .where(
            Alert.claimed_by_id == bindparam("q_rid"),  # ix_alert_claimed_by_id (review/models.py)
            Alert.claim_expires_at >= bindparam("q_now"),
            Alert.state.in_(REVIEW_STATES),
        )
        .order_by(Alert.received_at, Alert.id)
        .options(lazyload(Alert.device))
        .execution_options(populate_existing=True)
    )


def _held_claims(session: Session, reviewer: User, now: dt.datetime) -> list[Alert]:
    return list(session.scalars(_held_stmt(), {"q_rid": reviewer.id, "q_now": now}))


def _matches(alert: Alert, reviewer: User, trial_id: int | None, sound_class: str | None) -> bool:
    if trial_id is not None and alert.trial_id != trial_id:
        return False
    if sound_class and alert.sound_class != sound_class:
        return False
    if alert.private_flag and not hears_private(reviewer):
        return False
    return alert.clip.erased_at is None


# Statements on the hand-out path are built once (per shape) and run with bound values:
# building them costs more than the indexed lookups they perform.


def _free_bound() -> ColumnElement[bool]:
    return or_(
        Alert.claimed_by_id.is_(None),
        Alert.claim_expires_at < bindparam("q_now"),
        Alert.claimed_by_id == bindparam("q_rid"),
    )


@functools.cache
def _candidates_stmt(
    state: str, with_private: bool, by_trial: bool, by_sound: bool, limit: int
) -> Select[dt.datetime, int]:
    """The oldest free alerts in ``state``: an ordered walk of the (state, received_at) index."""
    q = select(Alert.received_at, Alert.id).where(
        Alert.state == state, _free_bound(), _clip_present(), _listening_allowed()
    )
    if not with_private:
        q = q.where(_not_private())
    if by_trial:
        q = q.where(Alert.trial_id == bindparam("q_trial_id"))
    if by_sound:
        q = q.where(Alert.sound_class == bindparam("q_sound_class"))
    if state == AlertState.second_review:  # never back to a reviewer of the clip
        q = q.where(~exists().where(Verdict.alert_id == Alert.id, Verdict.reviewer_id == bindparam("q_rid")))
    return q.order_by(Alert.received_at, Alert.id).limit(limit)


@functools.cache
def _take_stmt() -> Update:
    return (
        update(Alert)
        .where(Alert.id == bindparam("q_aid"), Alert.state.in_(REVIEW_STATES), _free_bound())
        .values(claimed_by_id=bindparam("q_rid"), claim_expires_at=bindparam("q_expires"))
        .execution_options(synchronize_session=False)
    )


@functools.cache
def _load_stmt() -> Select[Alert]:
    return (
        select(Alert)
        .where(Alert.id == bindparam("q_aid"))
        .options(lazyload(Alert.device))
        .execution_options(populate_existing=True)
    )


def _rowcount(result: Result[Any]) -> int:
    """Rows an UPDATE matched. Session.execute is typed as returning a plain Result, but for an
    UPDATE it is a CursorResult, the class that has the count."""
    return cast(CursorResult[Any], result).rowcount


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
    # Bound names carry a prefix: an UPDATE would read a column's own name as a value to set.
    params: dict[str, Any] = {"q_now": now, "q_rid": reviewer.id, "q_trial_id": trial_id}
    params["q_sound_class"] = sound_class
    with_private = hears_private(reviewer)
    for attempt in range(5):
        limit = 4 * 2**attempt + len(exclude)
        candidates: list[tuple[dt.datetime, int]] = []
        for state in REVIEW_STATES:
            stmt = _candidates_stmt(state, with_private, trial_id is not None, bool(sound_class), limit)
            candidates += [(r, i) for r, i in session.execute(stmt, params) if i not in exclude]
        if not candidates:
            return None
        for _received, alert_id in sorted(candidates):
            res = session.execute(_take_stmt(), {**params, "q_aid": alert_id, "q_expires": expires})
            if _rowcount(res) == 1:
                return session.scalars(_load_stmt(), {"q_aid": alert_id}).one()
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
    all_held = _held_claims(session, reviewer, now)
    held = [a for a in all_held if _matches(a, reviewer, trial_id, sound_class)]
    progress = _progress(session, reviewer.id) if gold_share > 0 else 0
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
    # Renew what is kept and let go of the rest; the flush writes only the rows that change.
    kept = {a.id for a in chosen}
    for a in all_held:
        if a.id in kept:
            a.claim_expires_at = expires
        else:
            a.claimed_by_id = None
            a.claim_expires_at = None
    session.flush()
    items = queue_items(session, chosen)
    return QueueView(items[0] if items else None, items[1] if len(items) > 1 else None)


def release_claims(session: Session, *, reviewer: User) -> int:
    """Give back every clip the reviewer holds (e.g. when they stop for the day)."""
    res = session.execute(
        update(Alert)
        .where(Alert.claimed_by_id == reviewer.id, Alert.state.in_(REVIEW_STATES))
        .values(claimed_by_id=None, claim_expires_at=None)
        .execution_options(synchronize_session="fetch")
    )
    return int(_rowcount(res) or 0)


def gold_for(session: Session, alert_id: int) -> GoldCheck | None:
    return session.scalar(select(GoldCheck).where(GoldCheck.alert_id == alert_id))


def gold_open_to(session: Session, gold: GoldCheck, reviewer: User) -> bool:
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
    if alert.private_flag and not hears_private(reviewer):
        raise PrivateContent("This clip was flagged as private content; only admins may listen to it.")
    if alert.state in REVIEW_STATES:
        live = alert.claim_expires_at is not None and alert.claim_expires_at >= now
        if alert.claimed_by_id == reviewer.id and live:
            return queue_item(session, alert)
        if alert.claimed_by_id not in (None, reviewer.id) and live:
            raise ClaimLost("Another reviewer is working on this clip; take the next one from the queue.")
        raise NotInReview("This clip is not handed out to you; take the next one from the queue.")
    gold = gold_for(session, alert.id)
    if alert.state == AlertState.final and gold is not None and gold_open_to(session, gold, reviewer):
        return queue_item(session, alert)
    raise NotInReview("This clip is not waiting for your review; take the next one from the queue.")


def queue_size(
    session: Session, *, reviewer: User, trial_id: int | None = None, sound_class: str | None = None
) -> int:
    """Clips this reviewer could be handed now (claimed ones included), for the queue page."""
    conds = _review_filter(reviewer, trial_id, sound_class)
    total = 0
    for state in REVIEW_STATES:
        q = select(func.count()).select_from(Alert).where(Alert.state == state, *conds)
        if state == AlertState.second_review:
            q = q.where(_not_reviewed_by(reviewer.id))
        total += int(session.scalar(q) or 0)
    return total
