"""Withdrawal with erasure, and the purge of clips past retention or flagged private.

Erasure removes a household's personal data and its audio (files deleted from the clip store
and checked gone) and keeps the de-identified alert rows the pilot's figures need. It takes two
steps: ``plan_erasure`` + ``erasure_ticket`` show what will happen, ``erase_home`` acts; running it
again on an erased home removes whatever arrived since (and nothing else).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import logging
from dataclasses import dataclass, field
from pathlib import Path

from sqlalchemy import event, select, update
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session

from server import audit
from server.db import utcnow
from server.devices import service as devices_service
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, Clip
from server.errors import AppError, ValidationFailed
from server.households import service
from server.households.models import Consent, Home, HomeContact, HomeState, HomeStateChange
from server.review import image_cache
from server.review.models import Verdict
from server.staged.models import StagedEvent
from server.trials.models import Trial

log = logging.getLogger(__name__)

TICKET_TTL = dt.timedelta(minutes=30)


class ErasureNotConfirmed(AppError):
    code, status = "erasure_not_confirmed", 409


@dataclass(frozen=True)
class ErasurePlan:
    code: str
    has_contact: bool
    clips_to_delete: int  # files that go
    clips_shared: int  # files kept because an alert outside this home uses the same bytes
    alerts_kept: int
    verdict_notes: int  # reviewer notes on this home's alerts, cleared
    timeline_notes: int  # notes on the home's state changes, cleared
    staged_events: int
    will_erase: tuple[str, ...]
    will_keep: tuple[str, ...]


def _home_clips(session: Session, home: Home) -> tuple[list[Clip], list[Clip]]:
    """(clips only this home's alerts use, clips also used outside it), neither yet erased."""
    clips = list(
        session.scalars(
            select(Clip)
            .join(Alert, Alert.clip_id == Clip.id)
            .where(Alert.home_id == home.id, Clip.erased_at.is_(None))
            .distinct()
        )
    )
    own: list[Clip] = []
    shared: list[Clip] = []
    for clip in clips:
        elsewhere = session.scalar(
            select(Alert.id)
            .where(Alert.clip_id == clip.id, Alert.home_id.is_(None) | (Alert.home_id != home.id))
            .limit(1)
        )
        (shared if elsewhere is not None else own).append(clip)
    return own, shared


def _verdict_notes(home: Home):  # type: ignore[no-untyped-def]
    """The reviewer notes erasure clears: plan and erasure use this same condition."""
    return (
        Verdict.alert_id.in_(select(Alert.id).where(Alert.home_id == home.id)),
        Verdict.note.is_not(None),
        Verdict.note != "",
    )


def _timeline_notes(home: Home):  # type: ignore[no-untyped-def]
    return (HomeStateChange.home_id == home.id, HomeStateChange.note.is_not(None), HomeStateChange.note != "")


def _counts(session: Session, home: Home) -> dict[str, int]:
    alert_ids = select(Alert.id).where(Alert.home_id == home.id)
    return {
        "alerts": len(list(session.scalars(alert_ids))),
        "verdict_notes": len(list(session.scalars(select(Verdict.id).where(*_verdict_notes(home))))),
        "timeline_notes": len(
            list(session.scalars(select(HomeStateChange.id).where(*_timeline_notes(home))))
        ),
        "staged": len(list(session.scalars(select(StagedEvent.id).where(StagedEvent.home_id == home.id)))),
    }


def plan_erasure(session: Session, home: Home) -> ErasurePlan:
    """Exactly what erasing this home removes and what it keeps."""
    own, shared = _home_clips(session, home)
    n = _counts(session, home)
    contact = service.has_contact(session, home)
    erase = [
        "the household's contact details (names, address, phone, e-mail, access notes)"
        + ("" if contact else " — none are on record"),
        f"{len(own)} audio clip file{'s' if len(own) != 1 else ''} of its alerts, removed from the clip "
        "store and checked gone, with their review images",
        f"{n['verdict_notes']} free-text reviewer note{'s' if n['verdict_notes'] != 1 else ''} on its alerts",
        f"{n['timeline_notes']} free-text note{'s' if n['timeline_notes'] != 1 else ''} on its timeline",
    ]
    keep = [
        f"the pseudonymous code {home.code}, its attributes (household type) and its timeline of states "
        "and dates",
        f"{n['alerts']} de-identified alert record{'s' if n['alerts'] != 1 else ''}: time, sound class, "
        "score, device and verdict (label and cause), which the pilot's figures need",
        "its installations (device, room, dates) and listening time, so monitored time stays right",
        "its consent record (form version, date, what it allowed)",
        f"{n['staged']} staged test event{'s' if n['staged'] != 1 else ''} (time, class, description)",
    ]
    if shared:
        keep.append(
            f"{len(shared)} clip file{'s' if len(shared) != 1 else ''} whose identical bytes also "
            "belong to an alert outside this home; only that other alert keeps it (this home's "
            "alerts lose their audio all the same)"
        )
    keep.append("the audit trail, which records this erasure")
    return ErasurePlan(
        home.code,
        contact,
        len(own),
        len(shared),
        n["alerts"],
        n["verdict_notes"],
        n["timeline_notes"],
        n["staged"],
        tuple(erase),
        tuple(keep),
    )


def _sign(secret: str, payload: str) -> str:
    return hmac.new(secret.encode(), payload.encode(), hashlib.sha256).hexdigest()[:32]


def erasure_ticket(secret: str, home: Home, *, now: dt.datetime | None = None) -> str:
    """The first step's receipt: names the home and expires after TICKET_TTL."""
    expires = int(((now or utcnow()) + TICKET_TTL).timestamp())
    payload = f"{home.id}.{home.code}.{expires}"
    return f"{expires}.{_sign(secret, payload)}"


def _check_ticket(secret: str, home: Home, ticket: str, now: dt.datetime) -> None:
    expires_s, _, sig = (ticket or "").partition(".")
    if not expires_s.isdigit() or not sig:
        raise ErasureNotConfirmed(
            f"The erasure of {home.code} was not confirmed; start again from its erasure page."
        )
    if not hmac.compare_digest(sig, _sign(secret, f"{home.id}.{home.code}.{expires_s}")):
        raise ErasureNotConfirmed(
            f"This confirmation does not belong to {home.code}; start again from its erasure page."
        )
    if now.timestamp() > int(expires_s):
        raise ErasureNotConfirmed(f"The confirmation for {home.code} expired; start the erasure again.")


def check_confirm_code(home: Home, typed: str) -> None:
    if (typed or "").strip().upper() != home.code:
        raise ValidationFailed(
            f"Type the home code {home.code} to confirm.", {"confirm_code": f"Type {home.code} exactly."}
        )


@dataclass(frozen=True)
class ErasureResult:
    code: str
    complete: bool
    contact_erased: bool
    clips_deleted: int
    clips_shared: int
    alerts_kept: int
    failed: tuple[str, ...] = field(default=())  # storage keys that would not go away
    verdict_notes: int = 0  # reviewer notes cleared
    timeline_notes: int = 0  # timeline notes cleared
    repeat: bool = False  # the home had been erased before: only what arrived since was removed


def _forget_images(cache_dir: Path | None, sha256: str) -> None:
    if cache_dir is None:
        return
    image_cache.forget(cache_dir, sha256)


def _delete_clip_files(
    session: Session,
    store: ClipStore,
    clips: list[Clip],
    reason: str,
    cache_dir: Path | None,
    now: dt.datetime,
) -> tuple[int, list[str]]:
    deleted, failed = 0, []
    for clip in clips:
        _forget_images(cache_dir, clip.sha256)
        if store.delete(clip.storage_key) and not store.exists(clip.storage_key):
            # Erased for good: identical bytes sent later get a clip row of their own.
            devices_service.mark_clip_erased(session, clip, reason, now)
            deleted += 1
        else:
            failed.append(clip.storage_key)
            log.error("clip file %s could not be removed", clip.storage_key)
    session.flush()
    return deleted, failed


def _detach_shared(session: Session, home: Home, shared: list[Clip], now: dt.datetime) -> int:
    """Point this home's alerts that share a clip with another home at an erased copy of its row.

    The file stays for the other alert; this home's alerts answer ``clip_erased`` from now on,
    whatever happens to the shared row later. Returns how many alerts were moved.
    """
    moved = 0
    columns = [c.key for c in Clip.__table__.columns if c.key not in ("id", "erased_at", "erased_reason")]
    for clip in shared:
        marker = Clip(**{k: getattr(clip, k) for k in columns}, erased_at=now, erased_reason="erasure")
        session.add(marker)
        session.flush()
        alerts = list(
            session.scalars(select(Alert).where(Alert.home_id == home.id, Alert.clip_id == clip.id))
        )
        for alert in alerts:
            alert.clip_id = marker.id
            alert.clip = marker
        moved += len(alerts)
    session.flush()
    return moved


def _rowcount(result: object) -> int:
    """Rows an UPDATE changed (a CursorResult's rowcount; typed loosely by SQLAlchemy)."""
    return int(getattr(result, "rowcount", 0))


def _checkpoint_after_commit(session: Session) -> None:
    """SQLite: when the erasure commits, fold the write-ahead log into the database file and
    truncate it, so the erased rows do not linger in the log (``secure_delete``, set on every
    connection, zeroes them in the file itself). PostgreSQL needs VACUUM instead (DEVELOPERS.md).

    A session bound to a connection (an outer transaction, as in tests) is left alone: the
    checkpoint could not finish while that transaction is open.
    """
    bind = session.get_bind()
    if bind.dialect.name != "sqlite" or not isinstance(bind, Engine):
        return
    engine = bind

    def checkpoint(_session: Session) -> None:
        try:
            raw = engine.raw_connection()
            try:
                cur = raw.cursor()
                busy, log_frames, done = cur.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
                cur.close()
            finally:
                raw.close()
        except Exception:  # the erasure itself has committed; a later checkpoint finishes the job
            log.exception("write-ahead log checkpoint after erasure failed")
            return
        if busy:
            log.warning(
                "write-ahead log checkpoint after erasure was blocked (%s of %s frames)", done, log_frames
            )

    event.listen(session, "after_commit", checkpoint, once=True)


def erase_home(
    session: Session,
    store: ClipStore,
    home: Home,
    *,
    secret: str,
    ticket: str,
    confirm_code: str,
    actor: service.Actor,
    now: dt.datetime | None = None,
    cache_dir: Path | None = None,
    note: str | None = None,
) -> ErasureResult:
    """Withdraw the home (if it is not already out) and erase its personal data and audio. Irreversible.

    Needs the ticket from the first step and the home code typed again. A file that cannot be
    removed leaves the erasure incomplete (``complete`` False, logged); running it again finishes it.
    Running it on a home already erased is allowed: it removes what arrived since (a reviewer's
    note, say) and keeps the first erasure's date. Its devices stay registered for reuse elsewhere:
    the home's installations end at the withdrawal, and a clip detected during one of them is
    refused on arrival (``devices.service.ClipOfErasedHome``).
    """
    now = now or utcnow()
    check_confirm_code(home, confirm_code)
    _check_ticket(secret, home, ticket, now)
    repeat = home.erased_at is not None
    if not repeat and home.state not in (HomeState.withdrawn, HomeState.declined):
        service.transition(
            session, home, HomeState.withdrawn, actor=actor, at=max(now, home.state_changed_at), note=None
        )
    contact = session.scalar(select(HomeContact).where(HomeContact.home_id == home.id))
    if contact is not None:
        session.delete(contact)
    alert_ids = select(Alert.id).where(Alert.home_id == home.id)
    verdict_notes = _rowcount(
        session.execute(
            update(Verdict)
            .where(*_verdict_notes(home))
            .values(note=None)
            .execution_options(synchronize_session=False)
        )
    )
    timeline_notes = _rowcount(
        session.execute(
            update(HomeStateChange)
            .where(*_timeline_notes(home))
            .values(note=None)
            .execution_options(synchronize_session=False)
        )
    )
    session.flush()
    own, shared = _home_clips(session, home)
    deleted, failed = _delete_clip_files(session, store, own, "erasure", cache_dir, now)
    _detach_shared(session, home, shared, now)
    kept = len(list(session.scalars(alert_ids)))
    complete = not failed
    if complete and not repeat:
        home.erased_at = now
    session.flush()
    # Expire what the bulk updates changed, so later reads in this session see it.
    for obj in list(session.identity_map.values()):
        if isinstance(obj, Verdict | HomeStateChange):
            session.expire(obj)
    audit.record(
        session,
        actor,
        "home.erase",
        "home",
        home.id,
        {
            "code": home.code,
            "contact_erased": contact is not None,
            "clips_deleted": deleted,
            "clips_shared_kept": len(shared),
            "alerts_kept": kept,
            "verdict_notes_cleared": verdict_notes,
            "timeline_notes_cleared": timeline_notes,
            "repeat": repeat,
            "complete": complete,
            "note": (note or "").strip()[:200] or None,
        },
    )
    _checkpoint_after_commit(session)
    return ErasureResult(
        home.code,
        complete,
        contact is not None,
        deleted,
        len(shared),
        kept,
        tuple(failed),
        verdict_notes,
        timeline_notes,
        repeat,
    )


# --- purge ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PurgeItem:
    clip_id: int
    storage_key: str
    reason: str  # "private" | "retention" | "no_home"
    homes: tuple[str, ...]  # codes of the homes whose alerts used the clip
    received_at: dt.datetime  # the latest receipt among its alerts


@dataclass(frozen=True)
class PurgeReport:
    applied: bool
    items: tuple[PurgeItem, ...]
    deleted: int
    failed: tuple[str, ...]
    # Clips with an alert that has no home's consent behind it (unassigned, or a home with no
    # consent on record), still inside their trial's ``unassigned_clip_retention_days``.
    waiting_no_home: int
    spools: tuple[str, ...] = ()  # upload spool files left by a crash (removed when applied)

    @property
    def by_reason(self) -> dict[str, int]:
        out = {"private": 0, "retention": 0, "no_home": 0}
        for i in self.items:
            out[i.reason] += 1
        return out


def purge_candidates(session: Session, now: dt.datetime) -> tuple[list[PurgeItem], int]:
    """Clips of alerts flagged private, and clips all of whose alerts are past their retention.

    An alert's retention is its home's latest consent (``retention_days`` from receipt); an alert
    with no home, or of a home with no consent on record, is kept for its trial's
    ``unassigned_clip_retention_days``. A clip goes when every alert using it is past its own.
    Returns the items and how many clips wait only on the second rule.
    """
    consents: dict[int, int] = {}
    for consent_home, days in session.execute(
        select(Consent.home_id, Consent.retention_days).order_by(Consent.recorded_at, Consent.id)
    ):
        consents[consent_home] = days  # the latest consent wins
    no_home_days = {t: d for t, d in session.execute(select(Trial.id, Trial.unassigned_clip_retention_days))}
    codes = {hid: code for hid, code in session.execute(select(Home.id, Home.code))}
    rows = session.execute(
        select(
            Clip.id, Clip.storage_key, Alert.home_id, Alert.trial_id, Alert.received_at, Alert.private_flag
        )
        .join(Alert, Alert.clip_id == Clip.id)
        .where(Clip.erased_at.is_(None))
        .order_by(Clip.id)
    )
    per_clip: dict[int, list[tuple[str, int | None, int, dt.datetime, bool]]] = {}
    for clip_id, key, home_id, trial_id, received_at, private in rows:
        per_clip.setdefault(clip_id, []).append((key, home_id, trial_id, received_at, bool(private)))
    items: list[PurgeItem] = []
    waiting_no_home = 0
    for clip_id, alerts in per_clip.items():
        key = alerts[0][0]
        homes = tuple(sorted({codes[h] for _, h, _, _, _ in alerts if h is not None}))
        latest = max(r for _, _, _, r, _ in alerts)
        if any(p for *_, p in alerts):
            items.append(PurgeItem(clip_id, key, "private", homes, latest))
            continue
        no_home = [h is None or h not in consents for _, h, _, _, _ in alerts]
        due = [
            r + dt.timedelta(days=no_home_days[t] if n else consents[h]) <= now  # type: ignore[index]
            for (_, h, t, r, _), n in zip(alerts, no_home, strict=True)
        ]
        if all(due):
            items.append(PurgeItem(clip_id, key, "no_home" if any(no_home) else "retention", homes, latest))
        elif any(n and not d for n, d in zip(no_home, due, strict=True)):
            waiting_no_home += 1
    return items, waiting_no_home


def purge_clips(
    session: Session,
    store: ClipStore,
    *,
    now: dt.datetime | None = None,
    apply: bool = False,
    actor: service.Actor = "cli",
    cache_dir: Path | None = None,
) -> PurgeReport:
    """Dry run by default: list what would go. With ``apply`` delete the files and mark the rows.

    Upload spool files left by a crash (older than ``ClipStore.SPOOL_GRACE``) are listed and, when
    applied, removed too: they hold raw audio that no row accounts for.
    """
    now = now or utcnow()
    items, waiting = purge_candidates(session, now)
    spools = store.stale_spools()
    deleted, failed = 0, []
    if apply and spools:
        spools = store.remove_spools(spools)
    if apply and items:
        for reason in ("private", "retention", "no_home"):
            ids = [i.clip_id for i in items if i.reason == reason]
            clips = list(session.scalars(select(Clip).where(Clip.id.in_(ids)))) if ids else []
            d, f = _delete_clip_files(session, store, clips, reason, cache_dir, now)
            deleted += d
            failed += f
    if apply and (items or spools):
        audit.record(
            session,
            actor,
            "storage.purge",
            "clip",
            None,
            {
                "deleted": deleted,
                "failed": len(failed),
                "private": sum(1 for i in items if i.reason == "private"),
                "retention": sum(1 for i in items if i.reason == "retention"),
                "no_home": sum(1 for i in items if i.reason == "no_home"),
                "spools_removed": len(spools),
            },
        )
    return PurgeReport(apply, tuple(items), deleted, tuple(failed), waiting, tuple(spools))
