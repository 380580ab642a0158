"""Review progress and reviewer agreement for the agreement page, the API and analytics.

Reads verdicts and gold answers; the maths is in ``agreement``.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy import ColumnElement, func, select
from sqlalchemy.orm import Session

from server.auth.models import User
from server.db import is_sqlite, utcnow
from server.devices.models import Alert, AlertState
from server.review import agreement
from server.review.models import LABELS, GoldAnswer, GoldCheck, Verdict
from server.review.queue import OPEN_STATES

MIN_SHARED_FOR_KAPPA = 20
# Verdict rounds compared for agreement: the first and the blind second review.
PAIRED_ROUNDS = (1, 2)
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)


# ---------------------------------------------------------------------------------------
# Overview for the agreement page and the analytics module


@dataclass(frozen=True)
class ReviewerPairKappa:
    reviewer_a: str
    reviewer_b: str
    shared: int
    kappa: agreement.Kappa
    agreement: agreement.Agreement


@dataclass(frozen=True)
class ReviewerQuality:
    reviewer_id: int
    name: str
    verdicts: int
    gold: agreement.Proportion | None
    throughput: agreement.Throughput | None


@dataclass(frozen=True)
class ReviewOverview:
    """Review progress and reviewer agreement for one trial (or all, when ``trial_id`` is None).

    ``backlog`` covers alerts without a final verdict (pending, awaiting a second review or
    adjudication); ages run from receipt to ``as_of``. Agreement figures use the first two
    verdicts (rounds 1 and 2) of every double-reviewed alert; adjudications are not counted.
    """

    trial_id: int | None
    as_of: dt.datetime
    backlog: agreement.Backlog
    by_state: dict[str, int]
    final_by_method: dict[str, int]
    double_reviewed: int
    percent_agreement: agreement.Agreement
    kappa_overall: agreement.Kappa
    pair_kappas: tuple[ReviewerPairKappa, ...]
    alpha: agreement.Alpha
    confusion: agreement.ConfusionMatrix
    reviewers: tuple[ReviewerQuality, ...]
    throughput_overall: agreement.Throughput
    throughput_since: dt.datetime
    min_shared_for_kappa: int = MIN_SHARED_FOR_KAPPA
    notes: tuple[str, ...] = field(default_factory=tuple)


def review_overview(
    session: Session,
    trial_id: int | None = None,
    *,
    now: dt.datetime | None = None,
    throughput_days: float = 7.0,
    idle_gap_s: float = 300.0,
) -> ReviewOverview:
    """Backlog, agreement and reviewer quality; the agreement page and analytics read this."""
    now = now or utcnow()
    trial_cond: list[ColumnElement[bool]] = [Alert.trial_id == trial_id] if trial_id is not None else []

    by_state = {s: 0 for s in AlertState.all}
    for state, n in session.execute(
        select(Alert.state, func.count()).where(*trial_cond).group_by(Alert.state)
    ):
        by_state[state] = int(n)
    methods = {m: 0 for m in ("single", "agreed", "adjudicated")}
    for method, n in session.execute(
        select(Alert.final_method, func.count())
        .where(Alert.state == AlertState.final, *trial_cond)
        .group_by(Alert.final_method)
    ):
        if method is not None:
            methods[method] = int(n)
    pending_times = session.scalars(
        select(Alert.received_at).where(Alert.state.in_(OPEN_STATES), *trial_cond)
    )
    backlog = agreement.backlog(list(pending_times), now)

    rows = session.execute(
        select(
            Verdict.id,
            Verdict.alert_id,
            Verdict.reviewer_id,
            Verdict.label,
            Verdict.round,
            Verdict.created_at,
        )
        .join(Alert, Alert.id == Verdict.alert_id)
        .where(*trial_cond)
    )
    vf = pd.DataFrame(
        rows.all(), columns=["order", "alert_id", "reviewer_id", "label", "round", "decided_at"]
    )
    names = dict(session.execute(select(User.id, User.name)).all())
    paired_frame = vf[vf["round"].isin(PAIRED_ROUNDS)]
    first, second = agreement.paired_labels(paired_frame)
    pa = agreement.percent_agreement(first, second)
    kappa_all = agreement.cohen_kappa(first, second, labels=list(LABELS))
    pairs = tuple(
        ReviewerPairKappa(
            names.get(p.reviewer_a, str(p.reviewer_a)),
            names.get(p.reviewer_b, str(p.reviewer_b)),
            p.shared,
            p.kappa,
            p.agreement,
        )
        for p in agreement.pairwise_kappas(paired_frame, min_shared=MIN_SHARED_FOR_KAPPA, labels=list(LABELS))
    )
    alpha = agreement.krippendorff_alpha_nominal(agreement.reliability_matrix(paired_frame))
    confusion = agreement.confusion_matrix(first, second, labels=list(LABELS))

    gold_rows = session.execute(
        select(GoldAnswer.reviewer_id, GoldAnswer.correct, GoldAnswer.created_at)
        .join(GoldCheck, GoldCheck.id == GoldAnswer.gold_check_id)
        .join(Alert, Alert.id == GoldCheck.alert_id)
        .where(*trial_cond)
    ).all()
    gf = pd.DataFrame(gold_rows, columns=["reviewer_id", "correct", "decided_at"])
    gold = {g.reviewer_id: g.accuracy for g in agreement.gold_accuracy(gf)}

    since = now - dt.timedelta(days=throughput_days)
    recent = pd.concat(
        [vf[["reviewer_id", "decided_at"]], gf[["reviewer_id", "decided_at"]]], ignore_index=True
    )
    if not recent.empty:
        recent["decided_at"] = pd.to_datetime(recent["decided_at"], utc=True)
        recent = recent[recent["decided_at"] >= pd.Timestamp(since)]
    tp = agreement.throughput(recent, idle_gap_s=idle_gap_s)
    counts = vf.groupby("reviewer_id").size().to_dict() if not vf.empty else {}
    reviewer_ids = sorted(set(counts) | set(gold) | {k for k in tp if k is not None})
    reviewers = tuple(
        ReviewerQuality(
            int(rid), names.get(rid, str(rid)), int(counts.get(rid, 0)), gold.get(rid), tp.get(rid)
        )
        for rid in reviewer_ids
    )
    notes = []
    if not pairs and len(first) > 0:
        notes.append(
            f"No reviewer pair shares {MIN_SHARED_FOR_KAPPA} or more clips yet, so no pairwise kappa."
        )
    return ReviewOverview(
        trial_id=trial_id,
        as_of=now,
        backlog=backlog,
        by_state=by_state,
        final_by_method=methods,
        double_reviewed=len(first),
        percent_agreement=pa,
        kappa_overall=kappa_all,
        pair_kappas=pairs,
        alpha=alpha,
        confusion=confusion,
        reviewers=reviewers,
        throughput_overall=tp[None],
        throughput_since=since,
        notes=tuple(notes),
    )


# ---------------------------------------------------------------------------------------
# The few figures the weekly summary shows, read lean


@dataclass(frozen=True)
class AgreementBrief:
    """Backlog and first-versus-second agreement: the same figures as those fields of ``ReviewOverview``.

    Reads only the receipt times of alerts without a final verdict and the round 1 and 2 verdicts of
    alerts that have a second review, so it stays quick on a large pilot.
    """

    trial_id: int | None
    as_of: dt.datetime
    backlog: agreement.Backlog
    double_reviewed: int
    percent_agreement: agreement.Agreement
    kappa_overall: agreement.Kappa
    alpha: agreement.Alpha


def agreement_brief(
    session: Session, trial_id: int | None = None, *, now: dt.datetime | None = None
) -> AgreementBrief:
    """Backlog, percent agreement, Cohen's kappa and Krippendorff's alpha for one trial (or all).

    Equal to ``review_overview``'s backlog, double_reviewed, percent_agreement, kappa_overall and
    alpha. Plain table queries: no ORM objects are built.
    """
    now = now or utcnow()
    alert = Alert.__table__.c
    trial_cond: list[ColumnElement[bool]] = [alert.trial_id == trial_id] if trial_id is not None else []
    backlog = agreement.backlog_of_ages(_waiting_s(session, trial_cond, now))

    v = Verdict.__table__
    first_v, second_v = v.alias("first_review"), v.alias("second_review")
    query = (
        select(
            second_v.c.alert_id,
            first_v.c.id,
            first_v.c.reviewer_id,
            first_v.c.label,
            second_v.c.id,
            second_v.c.reviewer_id,
            second_v.c.label,
        )
        .select_from(second_v)
        .join(first_v, (first_v.c.alert_id == second_v.c.alert_id) & (first_v.c.round == PAIRED_ROUNDS[0]))
        .where(second_v.c.round == PAIRED_ROUNDS[1])
    )
    if trial_cond:
        # EXISTS rather than a join, so that the planner walks the verdicts and looks up alerts, not
        # the other way round: a trial has many more alerts than second reviews.
        query = query.where(_alert_in_trial(second_v.c.alert_id, trial_cond))
    first: list[str] = []
    second: list[str] = []
    # As `agreement.paired_labels` pairs them: alerts in order, the earlier verdict first; the
    # same reviewer twice is no pair.
    for _, id_a, rev_a, lab_a, id_b, rev_b, lab_b in sorted(session.execute(query).all()):
        if rev_a != rev_b:
            first.append(lab_a if id_a < id_b else lab_b)
            second.append(lab_b if id_a < id_b else lab_a)
    confusion = agreement.confusion_matrix(first, second, labels=list(LABELS))
    if first:
        # Each pair is a unit with exactly two values: the coincidence matrix is C + C^T.
        alpha = agreement.krippendorff_alpha_from_coincidence(
            confusion.counts + confusion.counts.T, len(first)
        )
    else:  # the overview's reason: no first or second verdict at all, or none that pairs up
        any_verdict = select(v.c.id).where(v.c.round.in_(PAIRED_ROUNDS))
        if trial_cond:
            any_verdict = any_verdict.where(_alert_in_trial(v.c.alert_id, trial_cond))
        alpha = agreement.krippendorff_alpha_from_coincidence(np.zeros((0, 0)), 0)
        if session.execute(any_verdict.limit(1)).first() is None:
            alpha = agreement.krippendorff_alpha_nominal([])
    return AgreementBrief(
        trial_id=trial_id,
        as_of=now,
        backlog=backlog,
        double_reviewed=len(first),
        percent_agreement=agreement.percent_agreement(first, second),
        kappa_overall=agreement.cohen_kappa_from_table(confusion.counts),
        alpha=alpha,
    )


def _alert_in_trial(
    alert_id: ColumnElement[int], trial_cond: list[ColumnElement[bool]]
) -> ColumnElement[bool]:
    """The alert `alert_id` belongs to the trial (a correlated EXISTS)."""
    alert = Alert.__table__.c
    return sa.exists().where(alert.id == alert_id, *trial_cond)


def _waiting_s(session: Session, trial_cond: list[ColumnElement[bool]], now: dt.datetime) -> np.ndarray:
    """Seconds from receipt to ``now`` of every alert without a final verdict, as ``agreement.backlog``
    computes them: whole microseconds over 10^6, like ``timedelta.total_seconds``."""
    alert = Alert.__table__.c
    open_state = alert.state.in_(OPEN_STATES)
    if is_sqlite(session):
        # SQLite keeps only an average count per state, far above the open states' real share, so it
        # would scan the table; unlikely() tells it the condition is selective. Times are stored as
        # ISO 8601 text in UTC, and parsing them together is many times quicker than row by row.
        query = select(sa.type_coerce(alert.received_at, sa.String)).where(
            func.unlikely(open_state), *trial_cond
        )
        text = pd.Series(session.execute(query).scalars().all(), dtype=object)
        received = pd.to_datetime(text, format="ISO8601", utc=True).dt.tz_convert(None)
        received_us = received.to_numpy(dtype="datetime64[us]").astype(np.int64)
    else:
        # Integers cross the wire and convert far quicker than timestamps. extract() gives numeric
        # seconds with every microsecond (a double before PostgreSQL 14, still exact once rounded).
        micro = sa.cast(func.extract("epoch", alert.received_at) * 1_000_000, sa.BigInteger)
        rows = session.execute(select(micro).where(open_state, *trial_cond)).scalars().all()
        received_us = np.array(rows, dtype=np.int64)
    now_us = (now - _EPOCH) // dt.timedelta(microseconds=1)
    return (now_us - received_us) / 1e6


def overview_to_json(ov: ReviewOverview) -> dict[str, Any]:
    """Plain JSON for the API (NaN becomes null)."""

    def num(x: float | None) -> float | None:
        return None if x is None or (isinstance(x, float) and math.isnan(x)) else float(x)

    def prop(p: agreement.Proportion | None) -> dict[str, Any] | None:
        if p is None:
            return None
        return {
            "estimate": num(p.estimate),
            "low": num(p.low),
            "high": num(p.high),
            "successes": p.successes,
            "n": p.n,
            "confidence_level": p.confidence_level,
            "method": p.method,
            "reason": p.reason,
        }

    def thr(t: agreement.Throughput | None) -> dict[str, Any] | None:
        if t is None:
            return None
        return {
            "clips": t.clips,
            "verdicts": t.verdicts,
            "active_s": t.active_s,
            "idle_gap_s": t.idle_gap_s,
            "clips_per_hour": num(t.clips_per_hour),
            "reason": t.reason,
        }

    def kap(k: agreement.Kappa) -> dict[str, Any]:
        return {
            "estimate": num(k.estimate),
            "observed": num(k.observed),
            "expected": num(k.expected),
            "n": k.n,
            "reason": k.reason,
        }

    return {
        "trial_id": ov.trial_id,
        "as_of": ov.as_of.isoformat(),
        "backlog": {
            "count": ov.backlog.count,
            "oldest_age_s": num(ov.backlog.oldest_age_s),
            "median_age_s": num(ov.backlog.median_age_s),
        },
        "by_state": ov.by_state,
        "final_by_method": ov.final_by_method,
        "double_reviewed": ov.double_reviewed,
        "percent_agreement": {
            "estimate": num(ov.percent_agreement.estimate),
            "agreed": ov.percent_agreement.agreed,
            "n": ov.percent_agreement.n,
            "reason": ov.percent_agreement.reason,
        },
        "kappa": kap(ov.kappa_overall),
        "pair_kappas": [
            {
                "reviewer_a": p.reviewer_a,
                "reviewer_b": p.reviewer_b,
                "shared": p.shared,
                "kappa": kap(p.kappa),
                "agreement": num(p.agreement.estimate),
            }
            for p in ov.pair_kappas
        ],
        "min_shared_for_kappa": ov.min_shared_for_kappa,
        "alpha": {
            "estimate": num(ov.alpha.estimate),
            "observed_disagreement": num(ov.alpha.observed_disagreement),
            "expected_disagreement": num(ov.alpha.expected_disagreement),
            "pairable_values": ov.alpha.n_pairable_values,
            "units": ov.alpha.n_units,
            "reason": ov.alpha.reason,
        },
        "confusion": {"labels": list(ov.confusion.labels), "counts": ov.confusion.counts.tolist()},
        "reviewers": [
            {
                "reviewer_id": r.reviewer_id,
                "name": r.name,
                "verdicts": r.verdicts,
                "gold": prop(r.gold),
                "throughput": thr(r.throughput),
            }
            for r in ov.reviewers
        ],
        "throughput": thr(ov.throughput_overall),
        "throughput_since": ov.throughput_since.isoformat(),
        "notes": list(ov.notes),
    }
