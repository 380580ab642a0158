"""The lean review figures of the weekly summary against the full agreement overview, on both backends.

Scenario: two invented pilots share one database. Pilot A has nine first-and-second review pairs in the
random sample (one whose second review was stored before its first, one later adjudicated, one first
verdict "unsure" that the draw picked, one written without a recorded draw), two "unsure" first verdicts
sent on outside the draw (one adjudicated), a clip reviewed twice by the same reviewer, a clip with one
review, and three clips still waiting; pilot B has a pair and a waiting clip of its own, which must not
count for A.
"""

from __future__ import annotations

import datetime as dt

import krippendorff
import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import cohens_kappa, fleiss_kappa

from server.devices.models import AlertState
from server.review import overview
from server.review.models import LABELS, Verdict
from tests import factories

T0 = dt.datetime(2026, 2, 9, 8, 0, tzinfo=dt.UTC)
NOW = T0 + dt.timedelta(days=3, hours=5, seconds=0.25)

# (first label, second label) of each pair in the random sample, in verdict order.
PAIRS = [
    ("confirmed", "confirmed"),
    ("false_alarm", "false_alarm"),
    ("false_alarm", "unsure"),
    ("unusable", "false_alarm"),  # the second review was stored first: it comes first
    ("confirmed", "false_alarm"),
    ("false_alarm", "false_alarm"),
    ("unsure", "unsure"),  # drawn as well as unsure: in the sample
    ("false_alarm", "false_alarm"),  # no draw recorded: not unsure, so it can only have been drawn
    ("confirmed", "false_alarm"),  # later adjudicated
]
# The recorded draw of each pair's first verdict (None: written without routing).
DRAWN = [True, True, True, True, True, True, True, None, True]
# "Unsure" first verdicts sent on outside the draw: (second label, drawn as recorded).
UNSURE_ONLY = [("confirmed", False), ("false_alarm", None)]


def _alert(session, store, settings, device, minutes: float, state: str = AlertState.final):  # type: ignore[no-untyped-def]
    when = T0 + dt.timedelta(minutes=minutes, microseconds=int(minutes * 1731))
    a = factories.make_alert(session, store, settings, device, detected_at=when, now=when)
    a.state = state
    return a


def _verdict(session, alert, reviewer, round_: int, label: str, drawn: bool | None = None) -> None:  # type: ignore[no-untyped-def]
    session.add(
        Verdict(
            alert_id=alert.id,
            reviewer_id=reviewer.id,
            round=round_,
            label=label,
            created_at=NOW,
            random_draw=drawn,
        )
    )
    session.flush()


def _same(a: float, b: float) -> bool:
    return (np.isnan(a) and np.isnan(b)) or a == b


def _assert_brief_matches_overview(session, trial_id):  # type: ignore[no-untyped-def]
    brief = overview.agreement_brief(session, trial_id, now=NOW)
    full = overview.review_overview(session, trial_id, now=NOW)
    assert brief.backlog == full.backlog
    assert brief.double_reviewed == full.double_reviewed
    assert brief.percent_agreement == full.percent_agreement
    assert brief.kappa_overall == full.kappa_overall
    assert _same(brief.alpha.estimate, full.alpha.estimate)
    if brief.double_reviewed:
        assert brief.alpha == full.alpha
    assert brief.pooled_double_reviewed == full.pooled_double_reviewed
    assert brief.kappa_pooled == full.kappa_pooled
    assert brief.unsure_resolution == full.unsure_resolution
    assert brief.fleiss == full.fleiss
    assert brief.kappa_sample == full.kappa_sample
    return brief


def test_agreement_brief_equals_the_overview(session, store, settings, trial):  # type: ignore[no-untyped-def]
    r1 = factories.make_user(session, role="reviewer", name="Reviewer Ash")[0]
    r2 = factories.make_user(session, role="reviewer", name="Reviewer Birch")[0]
    r3 = factories.make_user(session, role="reviewer", name="Reviewer Cedar")[0]
    device, _ = factories.make_device(session, trial)

    paired = [_alert(session, store, settings, device, 10 * i) for i in range(len(PAIRS))]
    for i, (alert, (x, y)) in enumerate(zip(paired, PAIRS, strict=True)):
        if i == 3:
            _verdict(session, alert, r2, 2, x)
            _verdict(session, alert, r1, 1, y, DRAWN[i])
        else:
            _verdict(session, alert, r1, 1, x, DRAWN[i])
            _verdict(session, alert, r3 if i == 8 else r2, 2, y)
    _verdict(session, paired[8], r2, 3, "confirmed")
    unsure_only = [_alert(session, store, settings, device, 100 + i) for i in range(len(UNSURE_ONLY))]
    for alert, (y, drawn) in zip(unsure_only, UNSURE_ONLY, strict=True):
        _verdict(session, alert, r1, 1, "unsure", drawn)
        _verdict(session, alert, r2, 2, y)
    _verdict(session, unsure_only[0], r3, 3, "confirmed")
    twice = _alert(session, store, settings, device, 200)
    _verdict(session, twice, r1, 1, "false_alarm")
    _verdict(session, twice, r1, 2, "confirmed")
    once = _alert(session, store, settings, device, 210)
    _verdict(session, once, r2, 1, "confirmed")
    waiting = [
        _alert(session, store, settings, device, 300, AlertState.pending),
        _alert(session, store, settings, device, 30, AlertState.second_review),
        _alert(session, store, settings, device, 2000, AlertState.adjudication),
    ]
    session.flush()

    brief = _assert_brief_matches_overview(session, trial.id)
    first, second = [p[0] for p in PAIRS], [p[1] for p in PAIRS]
    ages = sorted((NOW - a.received_at).total_seconds() for a in waiting)
    assert brief.backlog.count == 3
    assert brief.backlog.oldest_age_s == ages[-1] and brief.backlog.median_age_s == ages[1]
    assert brief.double_reviewed == 9
    assert (brief.percent_agreement.agreed, brief.percent_agreement.n) == (5, 9)
    # Reference: scikit-learn's cohen_kappa_score (sklearn.metrics) on the same label pairs.
    assert brief.kappa_overall.estimate == pytest.approx(
        cohen_kappa_score(first, second, labels=list(LABELS)), abs=1e-12
    )
    # Interval: statsmodels' cohens_kappa (statsmodels.stats.inter_rater), same large-sample SE.
    table = np.zeros((len(LABELS), len(LABELS)))
    for x, y in zip(first, second, strict=True):
        table[LABELS.index(x), LABELS.index(y)] += 1
    ref_ci = cohens_kappa(table)
    assert brief.kappa_overall.std_error == pytest.approx(ref_ci.std_kappa, abs=1e-12)
    assert (brief.kappa_overall.low, brief.kappa_overall.high) == pytest.approx(
        (max(-1.0, ref_ci.kappa_low), min(1.0, ref_ci.kappa_upp)), abs=1e-12
    )
    # Pooled for comparison: the two unsure-only pairs join; the same-reviewer clip never counts.
    pooled_first = first + ["unsure", "unsure"]
    pooled_second = second + [y for y, _ in UNSURE_ONLY]
    assert brief.pooled_double_reviewed == 11
    assert brief.kappa_pooled.estimate == pytest.approx(
        cohen_kappa_score(pooled_first, pooled_second, labels=list(LABELS)), abs=1e-12
    )
    assert brief.kappa_pooled.estimate < brief.kappa_overall.estimate
    u = brief.unsure_resolution
    assert (u.first_unsure, u.drawn, u.awaiting_second, u.no_second) == (3, 1, 0, 0)
    assert u.second_said == {"confirmed": 1, "false_alarm": 1, "unsure": 1, "unusable": 0}
    assert u.settled == {"confirmed": 1, "false_alarm": 0, "unsure": 0, "unusable": 0}
    assert u.crossing == {"confirmed": {"confirmed": 1}, "false_alarm": {"open": 1}, "unsure": {"open": 1}}
    # Adjudicated clips with three reviewers: pair 8 (confirmed, false alarm, confirmed) and the
    # first unsure-only clip (unsure, confirmed, confirmed). Reference: statsmodels fleiss_kappa.
    adj = brief.fleiss.adjudication
    assert (adj.subjects, adj.ratings, adj.raters_min, adj.raters_max) == (2, 6, 3, 3)
    assert adj.estimate == pytest.approx(fleiss_kappa([[2, 1, 0, 0], [2, 0, 1, 0]]), abs=1e-12)
    assert brief.fleiss.gold.subjects == 0 and brief.fleiss.gold.reason is not None
    codes = {lab: i for i, lab in enumerate(LABELS)}
    ref = krippendorff.alpha(
        reliability_data=np.array([[codes[x] for x in first], [codes[y] for y in second]], dtype=float),
        level_of_measurement="nominal",
    )
    assert brief.alpha.estimate == pytest.approx(ref, abs=1e-12)

    # A second pilot's alerts and verdicts: the figures of the first stay as they were.
    other = factories.make_trial(session, code="ROWAN-2", name="Rowan Heath pilot")
    other_device, _ = factories.make_device(session, other)
    theirs = _alert(session, store, settings, other_device, 5)
    _verdict(session, theirs, r1, 1, "unusable")
    _verdict(session, theirs, r3, 2, "confirmed")
    _alert(session, store, settings, other_device, 1, AlertState.pending)
    session.flush()
    assert _assert_brief_matches_overview(session, trial.id) == brief
    both = _assert_brief_matches_overview(session, None)
    assert (both.backlog.count, both.double_reviewed, both.pooled_double_reviewed) == (4, 10, 12)


def test_agreement_brief_with_nothing_reviewed(session, store, settings, trial):  # type: ignore[no-untyped-def]
    device, _ = factories.make_device(session, trial)
    empty = _assert_brief_matches_overview(session, trial.id)
    assert empty.backlog.count == 0 and empty.double_reviewed == 0
    assert np.isnan(empty.alpha.estimate) and empty.kappa_overall.reason is not None

    reviewer = factories.make_user(session, role="reviewer")[0]
    alert = _alert(session, store, settings, device, 0)
    _verdict(session, alert, reviewer, 1, "confirmed")
    _alert(session, store, settings, device, 1, AlertState.pending)
    session.flush()
    one = _assert_brief_matches_overview(session, trial.id)
    assert one.backlog.count == 1 and one.double_reviewed == 0
    assert one.alpha.reason == overview.review_overview(session, trial.id, now=NOW).alpha.reason
