"""Review progress and reviewer agreement for the agreement page, the API and analytics.

Reads verdicts and gold answers; the maths is in ``agreement``.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Hashable
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
ROUND_ADJUDICATION = 3
CONFIDENCE_LEVEL = 0.95
# Which clips the agreement figures use, and why: shown on the agreement page and by the CLI.
SAMPLE_DESCRIPTION = "first against blind second verdict on the clips the random draw sent to a second review"
WHY_RANDOM = (
    "Agreement is measured only on clips the random draw picked, because the clips sent on for "
    "being unsure are the hardest ones, and counting them too would make reviewers look less "
    "consistent than they are on the clips they actually hear."
)
# Columns of the label tables shown for unsure clips: a label, or still open.
STILL_OPEN = "open"
NO_SECOND = "none"


@dataclass(frozen=True)
class UnsureResolution:
    """What became of first verdicts of "unsure" (kept out of the agreement sample unless drawn).

    ``second_said`` counts the second reviewers' labels, ``settled`` the adjudicators' labels;
    ``crossing`` maps each second label (``NO_SECOND`` for a private clip that went straight to
    adjudication, ``STILL_OPEN`` for one still waiting for its second review) to the counts of
    settled labels (``STILL_OPEN`` while adjudication is due).
    """

    first_unsure: int
    drawn: int
    awaiting_second: int
    no_second: int
    second_said: dict[str, int]
    awaiting_adjudication: int
    settled: dict[str, int]
    crossing: dict[str, dict[str, int]]


@dataclass(frozen=True)
class FleissSets:
    """Fleiss' kappa where three or more reviewers labelled a clip.

    ``gold``: gold-check clips, each reviewer's first label (review verdicts and gold answers).
    ``adjudication``: clips with first, second and adjudicator's verdicts; these are the clips
    reviewers disagreed or were unsure on, and the adjudicator saw both verdicts, so expect low
    agreement there by construction: it describes those clips, not everyday review.
    """

    gold: agreement.FleissKappa
    adjudication: agreement.FleissKappa


def _drawn(random_draw: bool | None, label: str) -> bool:
    """Whether a first verdict belongs to the random sample.

    ``random_draw`` as recorded; a first verdict written without routing (NULL) counts by the
    data: one other than "unsure" can only have reached a second review through the draw, while
    an unrecorded "unsure" one cannot be told apart and is left out.
    """
    if random_draw is not None:
        return bool(random_draw)
    return label != "unsure"


def _trial_cond(trial_id: int | None) -> list[ColumnElement[bool]]:
    alert = Alert.__table__.c
    return [alert.trial_id == trial_id] if trial_id is not None else []


def _label_order(found: Any) -> list[str]:
    extra = sorted({str(x) for x in found} - set(LABELS))
    return list(LABELS) + extra


def unsure_resolution(session: Session, trial_id: int | None = None) -> UnsureResolution:
    """Counts for every alert whose first verdict was "unsure" (see ``UnsureResolution``)."""
    v = Verdict.__table__
    alert = Alert.__table__.c
    first = v.alias("unsure_first")
    query = (
        select(v.c.alert_id, v.c.round, v.c.id, v.c.label, first.c.random_draw, alert.state)
        .select_from(v)
        .join(first, (first.c.alert_id == v.c.alert_id) & (first.c.round == PAIRED_ROUNDS[0]))
        .join(Alert.__table__, alert.id == v.c.alert_id)
        .where(first.c.label == "unsure", *_trial_cond(trial_id))
    )
    rows = sorted(session.execute(query).all(), key=lambda r: (r[0], r[1], r[2]))
    by_alert: dict[int, dict[Any, Any]] = {}
    for alert_id, round_, _id, label, drawn, state in rows:
        entry = by_alert.setdefault(alert_id, {"drawn": bool(drawn), "state": state})
        entry.setdefault(round_, label)  # the earliest verdict of each round
    labels = _label_order(r[3] for r in rows)
    second_said = {lab: 0 for lab in labels}
    settled = {lab: 0 for lab in labels}
    crossing: dict[str, dict[str, int]] = {}
    awaiting_second = no_second = awaiting_adj = drawn = 0
    for entry in by_alert.values():
        drawn += entry["drawn"]
        second = entry.get(PAIRED_ROUNDS[1])
        final = entry.get(ROUND_ADJUDICATION)
        if second is not None:
            second_said[second] += 1
            row = second
        elif entry["state"] in (AlertState.pending, AlertState.second_review):
            awaiting_second += 1
            row = STILL_OPEN
        else:
            no_second += 1
            row = NO_SECOND
        if final is not None:
            settled[final] += 1
            col = final
        else:
            awaiting_adj += int(entry["state"] == AlertState.adjudication)
            col = STILL_OPEN
        if row == STILL_OPEN:
            col = STILL_OPEN
        cells = crossing.setdefault(row, {})
        cells[col] = cells.get(col, 0) + 1
    order = [*labels, NO_SECOND, STILL_OPEN]
    return UnsureResolution(
        first_unsure=len(by_alert),
        drawn=drawn,
        awaiting_second=awaiting_second,
        no_second=no_second,
        second_said=second_said,
        awaiting_adjudication=awaiting_adj,
        settled=settled,
        crossing={
            r: dict(sorted(crossing[r].items(), key=lambda kv: order.index(kv[0])))
            for r in order
            if r in crossing
        },
    )


def fleiss_sets(session: Session, trial_id: int | None = None) -> FleissSets:
    """Fleiss' kappa over gold-check clips and over adjudicated clips (see ``FleissSets``)."""
    trial_cond = _trial_cond(trial_id)
    v = Verdict.__table__.c
    gold = GoldCheck.__table__.c
    answer = GoldAnswer.__table__.c
    alert = Alert.__table__.c
    in_trial = [sa.exists().where(alert.id == gold.alert_id, *trial_cond)] if trial_cond else []
    gold_answers = session.execute(
        select(gold.alert_id, answer.reviewer_id, answer.label, answer.created_at, answer.id)
        .join(GoldCheck.__table__, gold.id == answer.gold_check_id)
        .where(*in_trial)
    ).all()
    # Blind verdicts only: the adjudicator of a gold clip heard it with both verdicts in view.
    gold_verdicts = session.execute(
        select(v.alert_id, v.reviewer_id, v.label, v.created_at, v.id)
        .join(GoldCheck.__table__, gold.alert_id == v.alert_id)
        .where(v.round.in_(PAIRED_ROUNDS), *in_trial)
    ).all()
    # Each reviewer's earliest label counts; a verdict goes before a gold answer at the same instant.
    ranked = sorted(
        [(at, 0, rid, unit, rater, label) for unit, rater, label, at, rid in gold_verdicts]
        + [(at, 1, rid, unit, rater, label) for unit, rater, label, at, rid in gold_answers],
        key=lambda r: (r[0], r[1], r[2]),
    )
    gf = pd.DataFrame(
        [(unit, rater, label, i) for i, (_, _, _, unit, rater, label) in enumerate(ranked)],
        columns=["unit", "rater", "label", "order"],
    )

    settled = Verdict.__table__.alias("settled")
    adjudicated: list[ColumnElement[bool]] = [
        sa.exists().where(settled.c.alert_id == v.alert_id, settled.c.round == ROUND_ADJUDICATION)
    ]
    if trial_cond:
        adjudicated.append(sa.exists().where(alert.id == v.alert_id, *trial_cond))
    adj_rows = session.execute(
        select(v.alert_id, v.reviewer_id, v.label, v.round, v.id).where(*adjudicated)
    ).all()
    af = pd.DataFrame(
        [
            (unit, rater, label, i)
            for i, (unit, rater, label, _, _) in enumerate(sorted(adj_rows, key=lambda r: (r[0], r[3], r[4])))
        ],
        columns=["unit", "rater", "label", "order"],
    )

    def kappa_of(frame: pd.DataFrame) -> agreement.FleissKappa:
        labels = _label_order(frame["label"]) if not frame.empty else list(LABELS)
        table = agreement.rating_table(frame, labels, min_raters=3)
        return agreement.fleiss_kappa(table)

    return FleissSets(gold=kappa_of(gf), adjudication=kappa_of(af))


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
    adjudication); ages run from receipt to ``as_of``. Agreement figures (``double_reviewed``,
    ``percent_agreement``, ``kappa_overall`` with its interval, ``pair_kappas``, ``alpha``,
    ``confusion``) use the first two verdicts (rounds 1 and 2) of the alerts in the random
    sample only (``kappa_sample``, ``_drawn``); adjudications are not counted. ``kappa_pooled``
    and ``pooled_double_reviewed`` are the same measure over every double-reviewed alert, the
    random sample plus every "unsure" first verdict, kept for comparison only.
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
    sample_drawn: int
    pooled_double_reviewed: int
    kappa_pooled: agreement.Kappa
    unsure_resolution: UnsureResolution
    fleiss: FleissSets
    kappa_sample: str = SAMPLE_DESCRIPTION
    why_random: str = WHY_RANDOM
    min_shared_for_kappa: int = MIN_SHARED_FOR_KAPPA
    notes: tuple[str, ...] = field(default_factory=tuple)


def _reviewer_id(key: Hashable) -> int:
    """A reviewer id as the agreement maths gives it back: a frame key, an int or a numpy integer."""
    if not isinstance(key, int | np.integer):
        raise TypeError(f"Reviewer id {key!r} is not an integer.")
    return int(key)


def _reviewer_name(names: dict[int, str], key: Hashable) -> str:
    rid = _reviewer_id(key)
    return names.get(rid, str(rid))


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
            Verdict.random_draw,
        )
        .join(Alert, Alert.id == Verdict.alert_id)
        .where(*trial_cond)
    )
    vf = pd.DataFrame(
        rows.all(),
        columns=["order", "alert_id", "reviewer_id", "label", "round", "decided_at", "random_draw"],
    )
    names = dict(session.execute(select(User.id, User.name)).all())
    pooled_frame = vf[vf["round"].isin(PAIRED_ROUNDS)]
    firsts = vf[vf["round"] == PAIRED_ROUNDS[0]]
    drawn_ids = {
        a
        for a, d, lab in zip(firsts["alert_id"], firsts["random_draw"], firsts["label"], strict=True)
        if _drawn(None if pd.isna(d) else bool(d), lab)
    }
    paired_frame = pooled_frame[pooled_frame["alert_id"].isin(drawn_ids)]
    first, second = agreement.paired_labels(paired_frame)
    pa = agreement.percent_agreement(first, second)
    confusion = agreement.confusion_matrix(first, second, labels=list(LABELS))
    kappa_all = agreement.kappa_interval(
        confusion.counts, agreement.cohen_kappa_from_table(confusion.counts), CONFIDENCE_LEVEL
    )
    pooled_first, pooled_second = agreement.paired_labels(pooled_frame)
    pooled_table = agreement.confusion_matrix(pooled_first, pooled_second, labels=list(LABELS)).counts
    kappa_pooled = agreement.kappa_interval(
        pooled_table, agreement.cohen_kappa_from_table(pooled_table), CONFIDENCE_LEVEL
    )
    pairs = tuple(
        ReviewerPairKappa(
            _reviewer_name(names, p.reviewer_a),
            _reviewer_name(names, p.reviewer_b),
            p.shared,
            p.kappa,
            p.agreement,
        )
        for p in agreement.pairwise_kappas(paired_frame, min_shared=MIN_SHARED_FOR_KAPPA, labels=list(LABELS))
    )
    if paired_frame.empty and not pooled_frame.empty:  # verdicts, but none in the sample
        alpha = agreement.krippendorff_alpha_from_coincidence(np.zeros((0, 0)), 0)
    else:
        alpha = agreement.krippendorff_alpha_nominal(agreement.reliability_matrix(paired_frame))

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
    reviewer_ids = sorted(_reviewer_id(k) for k in set(counts) | set(gold) | {k for k in tp if k is not None})
    reviewers = tuple(
        ReviewerQuality(rid, names.get(rid, str(rid)), int(counts.get(rid, 0)), gold.get(rid), tp.get(rid))
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
        sample_drawn=len(drawn_ids),
        pooled_double_reviewed=len(pooled_first),
        kappa_pooled=kappa_pooled,
        unsure_resolution=unsure_resolution(session, trial_id),
        fleiss=fleiss_sets(session, trial_id),
        notes=tuple(notes),
    )


# ---------------------------------------------------------------------------------------
# The few figures the weekly summary shows, read lean


@dataclass(frozen=True)
class AgreementBrief:
    """Backlog and first-versus-second agreement: the same figures as those fields of ``ReviewOverview``.

    Agreement is measured on the random sample only (``kappa_sample``); ``pooled_*`` and
    ``kappa_pooled`` add every "unsure" first verdict and are for comparison. Reads only the
    receipt times of alerts without a final verdict, the round 1 and 2 verdicts of alerts that
    have a second review, and the few verdicts and gold answers behind ``unsure_resolution`` and
    ``fleiss``, so it stays quick on a large pilot.
    """

    trial_id: int | None
    as_of: dt.datetime
    backlog: agreement.Backlog
    double_reviewed: int
    percent_agreement: agreement.Agreement
    kappa_overall: agreement.Kappa
    alpha: agreement.Alpha
    pooled_double_reviewed: int
    kappa_pooled: agreement.Kappa
    unsure_resolution: UnsureResolution
    fleiss: FleissSets
    kappa_sample: str = SAMPLE_DESCRIPTION
    why_random: str = WHY_RANDOM


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
            first_v.c.random_draw,
            first_v.c.label,
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
    pooled_first: list[str] = []
    pooled_second: list[str] = []
    # As `agreement.paired_labels` pairs them: alerts in order, the earlier verdict first; the
    # same reviewer twice is no pair.
    rows = sorted(session.execute(query).all(), key=lambda r: r[:7])
    for _, id_a, rev_a, lab_a, id_b, rev_b, lab_b, drawn, first_label in rows:
        if rev_a != rev_b:
            pair = (lab_a, lab_b) if id_a < id_b else (lab_b, lab_a)
            pooled_first.append(pair[0])
            pooled_second.append(pair[1])
            if _drawn(drawn, first_label):
                first.append(pair[0])
                second.append(pair[1])
    confusion = agreement.confusion_matrix(first, second, labels=list(LABELS))
    pooled_table = agreement.confusion_matrix(pooled_first, pooled_second, labels=list(LABELS)).counts
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
        kappa_overall=agreement.kappa_interval(
            confusion.counts, agreement.cohen_kappa_from_table(confusion.counts), CONFIDENCE_LEVEL
        ),
        alpha=alpha,
        pooled_double_reviewed=len(pooled_first),
        kappa_pooled=agreement.kappa_interval(
            pooled_table, agreement.cohen_kappa_from_table(pooled_table), CONFIDENCE_LEVEL
        ),
        unsure_resolution=unsure_resolution(session, trial_id),
        fleiss=fleiss_sets(session, trial_id),
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

    def kap_ci(k: agreement.Kappa) -> dict[str, Any]:
        return {
            **kap(k),
            "low": num(k.low),
            "high": num(k.high),
            "std_error": num(k.std_error),
            "confidence_level": k.confidence_level,
            "method": k.method,
        }

    def fleiss(f: agreement.FleissKappa) -> dict[str, Any]:
        return {
            "estimate": num(f.estimate),
            "observed": num(f.observed),
            "expected": num(f.expected),
            "clips": f.subjects,
            "ratings": f.ratings,
            "reviewers_min": f.raters_min,
            "reviewers_max": f.raters_max,
            "reason": f.reason,
        }

    u = ov.unsure_resolution

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
        "sample": {"description": ov.kappa_sample, "why": ov.why_random, "drawn": ov.sample_drawn},
        "kappa": kap_ci(ov.kappa_overall),
        "pooled": {"double_reviewed": ov.pooled_double_reviewed, "kappa": kap_ci(ov.kappa_pooled)},
        "unsure_resolution": {
            "first_unsure": u.first_unsure,
            "drawn": u.drawn,
            "awaiting_second": u.awaiting_second,
            "no_second": u.no_second,
            "second_said": u.second_said,
            "awaiting_adjudication": u.awaiting_adjudication,
            "settled": u.settled,
            "crossing": u.crossing,
        },
        "fleiss": {"gold": fleiss(ov.fleiss.gold), "adjudication": fleiss(ov.fleiss.adjudication)},
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
