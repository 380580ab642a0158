"""The lean review figures of the weekly summary against the full agreement overview, on both backends.

Scenario: two invented pilots share one database. Pilot A has nine first-and-second review pairs (one
whose second review was stored before its first, one later adjudicated), a clip reviewed twice by the
same reviewer, a clip with one review, and three clips still waiting; pilot B has a pair and a waiting
clip of its own, which must not count for A.
"""

from __future__ import annotations

import datetime as dt

import krippendorff
import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score

from server.devices.models import AlertState
from server.review import overview
from server.review.models import LABELS, Verdict
from tests import factories

T0 = dt.datetime(2026, 2, 9, 8, 0, tzinfo=dt.UTC)
NOW = T0 + dt.timedelta(days=3, hours=5, seconds=0.25)

# (first label, second label) of each pair in verdict order.
PAIRS = [
    ("confirmed", "confirmed"),
    ("false_alarm", "false_alarm"),
    ("false_alarm", "unsure"),
    ("unusable", "false_alarm"),  # the second review was stored first: it comes first
    ("confirmed", "false_alarm"),
    ("false_alarm", "false_alarm"),
    ("unsure", "unsure"),
    ("false_alarm", "false_alarm"),
    ("confirmed", "false_alarm"),  # later adjudicated
]


def _alert(session, store, settings, device, minutes: float, state: str = AlertState.final):  # type: ignore[no-untyped-def]
    when = T0 + dt.timedelta(minutes=minutes, microseconds=int(minutes * 1731))
    a = factories.make_alert(session, store, settings, device, detected_at=when, now=when)
    a.state = state
    return a


def _verdict(session, alert, reviewer, round_: int, label: str) -> None:  # type: ignore[no-untyped-def]
    session.add(
        Verdict(alert_id=alert.id, reviewer_id=reviewer.id, round=round_, label=label, created_at=NOW)
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
            _verdict(session, alert, r1, 1, y)
        else:
            _verdict(session, alert, r1, 1, x)
            _verdict(session, alert, r3 if i == 8 else r2, 2, y)
    _verdict(session, paired[8], r2, 3, "confirmed")
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
    assert brief.kappa_overall.estimate == pytest.approx(
        cohen_kappa_score(first, second, labels=list(LABELS)), abs=1e-12
    )
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
    assert (both.backlog.count, both.double_reviewed) == (4, 10)


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
