"""The review queue and verdict flow through the service functions, on both backends."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select

from server.devices.models import Alert, AlertState
from server.errors import Forbidden, ValidationFailed
from server.review import queue, service
from server.review.models import GoldAnswer, Verdict
from tests import factories

KEY = b"k" * 32
T0 = dt.datetime.now(dt.UTC).replace(microsecond=0) - dt.timedelta(hours=2)


def _alerts(session, store, settings, trial, n, *, start=T0, step_min=1, **kw):
    device, _ = factories.make_device(session, trial)
    return [
        factories.make_alert(
            session,
            store,
            settings,
            device,
            now=start + dt.timedelta(minutes=step_min * i),
            detected_at=start + dt.timedelta(minutes=step_min * i),
            **kw,
        )
        for i in range(n)
    ]


def _reviewer(session, **kw):
    return factories.make_user(session, role="reviewer", **kw)[0]


def _no_second(trial, session):
    trial.second_review_share = 0.0
    session.flush()


def _fa(session, reviewer, alert_id, now=None, **kw):
    args = {"label": "false_alarm", "cause": "dog", "resemblance": "unrelated"}
    args.update(kw)
    return service.record_verdict(session, reviewer=reviewer, alert_id=alert_id, key=KEY, now=now, **args)


# --- claims ------------------------------------------------------------------------------------------


def test_claim_hands_out_oldest_first_and_holds_two(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 4)
    r1, r2 = _reviewer(session), _reviewer(session)
    v1 = service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    assert (v1.current.alert_id, v1.next.alert_id) == (a[0].id, a[1].id)
    v2 = service.claim_next(session, reviewer=r2, key=KEY, gold_share=0)
    # Both of r1's clips are held, so r2 starts after them.
    assert (v2.current.alert_id, v2.next.alert_id) == (a[2].id, a[3].id)
    again = service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    assert (again.current.alert_id, again.next.alert_id) == (a[0].id, a[1].id)
    assert session.get(Alert, a[0].id).claimed_by_id == r1.id


def test_expired_claim_returns_clip_to_queue(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 2)
    r1, r2 = _reviewer(session), _reviewer(session)
    now = dt.datetime.now(dt.UTC)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0, claim_minutes=5, now=now)
    assert (
        service.claim_next(
            session, reviewer=r2, key=KEY, gold_share=0, now=now + dt.timedelta(minutes=4)
        ).current
        is None
    )
    later = service.claim_next(session, reviewer=r2, key=KEY, gold_share=0, now=now + dt.timedelta(minutes=6))
    assert later.current.alert_id == a[0].id and later.next.alert_id == a[1].id
    assert session.get(Alert, a[0].id).claimed_by_id == r2.id


def test_claim_expiry_follows_claim_minutes(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    r = _reviewer(session)
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    service.claim_next(session, reviewer=r, key=KEY, gold_share=0, claim_minutes=2.5, now=now)
    assert session.get(Alert, a[0].id).claim_expires_at == now + dt.timedelta(minutes=2.5)


def test_verdict_on_clip_claimed_by_someone_else_is_refused(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    r1, r2 = _reviewer(session), _reviewer(session)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    with pytest.raises(queue.ClaimLost) as exc:
        _fa(session, r2, a[0].id)
    assert exc.value.status == 409 and exc.value.code == "claim_lost"
    with pytest.raises(queue.ClaimLost):
        queue.get_review_item(session, reviewer=r2, alert_id=a[0].id)


def test_late_verdict_after_expiry_is_kept_when_nobody_took_the_clip(session, store, settings, trial):
    _no_second(trial, session)
    a = _alerts(session, store, settings, trial, 1)
    r = _reviewer(session)
    now = dt.datetime.now(dt.UTC)
    service.claim_next(session, reviewer=r, key=KEY, gold_share=0, claim_minutes=5, now=now)
    _fa(session, r, a[0].id, now=now + dt.timedelta(minutes=9))
    assert session.get(Alert, a[0].id).final_label == "false_alarm"


def test_queue_filters_by_trial_and_sound_class(session, store, settings, trial):
    other = factories.make_trial(session)
    a_smoke = _alerts(session, store, settings, trial, 1, sound_class="smoke_alarm")
    a_cry = _alerts(
        session, store, settings, trial, 1, start=T0 + dt.timedelta(minutes=10), sound_class="baby_cry"
    )
    a_other = _alerts(session, store, settings, other, 1, start=T0 - dt.timedelta(minutes=30))
    r = _reviewer(session)
    v = service.claim_next(
        session, reviewer=r, trial_id=trial.id, sound_class="baby_cry", key=KEY, gold_share=0
    )
    assert v.current.alert_id == a_cry[0].id and v.next is None
    v = service.claim_next(session, reviewer=r, trial_id=trial.id, key=KEY, gold_share=0)
    assert {v.current.alert_id, v.next.alert_id} == {a_smoke[0].id, a_cry[0].id}
    # Without a filter the reviewer keeps the two clips already held.
    v = service.claim_next(session, reviewer=r, key=KEY, gold_share=0)
    assert (v.current.alert_id, v.next.alert_id) == (a_smoke[0].id, a_cry[0].id)
    # Another trial: its clip is handed out and the claims outside the hand-out are released.
    v = service.claim_next(session, reviewer=r, trial_id=other.id, key=KEY, gold_share=0)
    assert v.current.alert_id == a_other[0].id and v.next is None
    held = session.scalars(select(Alert.id).where(Alert.claimed_by_id == r.id)).all()
    assert held == [a_other[0].id]
    # A second reviewer with no filter now gets the oldest clip of all first.
    r2 = _reviewer(session)
    assert service.claim_next(session, reviewer=r2, key=KEY, gold_share=0).current.alert_id == a_smoke[0].id


def test_queue_item_shows_local_time_home_and_room(session, store, settings):
    trial = factories.make_trial(session, timezone="Pacific/Auckland")
    device, _ = factories.make_device(session, trial)
    home = factories.make_home(session, trial)
    factories.make_installation(session, device, home, room="nursery", installed_at=T0 - dt.timedelta(days=3))
    alert = factories.make_alert(session, store, settings, device, now=T0, detected_at=T0, score=0.77)
    r = _reviewer(session)
    item = service.claim_next(session, reviewer=r, key=KEY, gold_share=0).current
    assert item.alert_id == alert.id
    assert (item.home_code, item.room, item.score) == (home.code, "nursery", pytest.approx(0.77))
    assert item.detected_local.utcoffset() in (dt.timedelta(hours=12), dt.timedelta(hours=13))
    assert item.detected_local == T0
    assert [c.code for c in item.causes][:2] == ["speech", "tv_radio_music"]
    assert [c.key for c in item.causes][:3] == ["1", "2", "3"]


# --- verdicts and blind second review -----------------------------------------------------------------


def test_single_verdict_is_final_with_method_single(session, store, settings, trial):
    _no_second(trial, session)
    a = _alerts(session, store, settings, trial, 1)
    r = _reviewer(session)
    service.claim_next(session, reviewer=r, key=KEY, gold_share=0)
    _fa(session, r, a[0].id, cause="door_knock_impact", resemblance="resembles", note="slammed")
    alert = session.get(Alert, a[0].id)
    assert (
        alert.state,
        alert.final_label,
        alert.final_cause,
        alert.final_resemblance,
        alert.final_method,
    ) == (AlertState.final, "false_alarm", "door_knock_impact", "resembles", "single")
    assert alert.claimed_by_id is None and alert.finalized_at is not None


def test_verdict_rules(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    r = _reviewer(session)
    service.claim_next(session, reviewer=r, key=KEY, gold_share=0)
    for kw, field in [
        ({"label": "maybe"}, "label"),
        ({"label": "false_alarm", "resemblance": "unrelated"}, "cause"),
        ({"label": "false_alarm", "cause": "volcano", "resemblance": "unrelated"}, "cause"),
        ({"label": "false_alarm", "cause": "dog"}, "resemblance"),
        ({"label": "confirmed", "cause": "dog"}, "cause"),
    ]:
        with pytest.raises(ValidationFailed) as exc:
            service.record_verdict(session, reviewer=r, alert_id=a[0].id, key=KEY, **kw)
        assert field in exc.value.errors
    assert session.scalars(select(Verdict)).all() == []


def test_second_review_share_is_deterministic_and_close_to_share():
    chosen = [queue.chosen_for_second_review(KEY, i, 0.10) for i in range(1, 20001)]
    assert chosen == [queue.chosen_for_second_review(KEY, i, 0.10) for i in range(1, 20001)]
    # 20000 ids at 10%: 2000 expected, binomial sd about 42; the key fixes the outcome.
    assert 1800 <= sum(chosen) <= 2200
    other_key = [queue.chosen_for_second_review(b"another key" * 3, i, 0.10) for i in range(1, 20001)]
    assert chosen != other_key
    assert not any(queue.chosen_for_second_review(KEY, i, 0.0) for i in range(1, 2000))
    assert all(queue.chosen_for_second_review(KEY, i, 1.0) for i in range(1, 2000))


def test_unsure_always_goes_to_a_different_second_reviewer(session, store, settings, trial):
    _no_second(trial, session)
    a = _alerts(session, store, settings, trial, 1)
    r1, r2 = _reviewer(session), _reviewer(session)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=r1, alert_id=a[0].id, label="unsure", key=KEY)
    alert = session.get(Alert, a[0].id)
    assert alert.state == AlertState.second_review and alert.needs_second_review and alert.final_label is None
    # Not back to the first reviewer.
    assert service.claim_next(session, reviewer=r1, key=KEY, gold_share=0).current is None
    with pytest.raises(queue.NotInReview):
        queue.get_review_item(session, reviewer=r1, alert_id=a[0].id)
    assert service.claim_next(session, reviewer=r2, key=KEY, gold_share=0).current.alert_id == a[0].id


def test_first_reviewer_cannot_give_second_verdict(session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 1)
    r1 = _reviewer(session)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    _fa(session, r1, a[0].id)
    with pytest.raises(queue.SameReviewer) as exc:
        _fa(session, r1, a[0].id)
    assert exc.value.status == 403


def test_agreeing_second_review_finalises_as_agreed(session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 1)
    r1, r2 = _reviewer(session), _reviewer(session)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    _fa(session, r1, a[0].id, cause="appliance", resemblance="resembles")
    assert session.get(Alert, a[0].id).state == AlertState.second_review
    assert session.get(Alert, a[0].id).final_label is None
    service.claim_next(session, reviewer=r2, key=KEY, gold_share=0)
    _fa(session, r2, a[0].id, cause="appliance", resemblance="resembles")
    alert = session.get(Alert, a[0].id)
    assert (alert.state, alert.final_label, alert.final_cause, alert.final_method) == (
        AlertState.final,
        "false_alarm",
        "appliance",
        "agreed",
    )
    rounds = session.scalars(
        select(Verdict.round).where(Verdict.alert_id == alert.id).order_by(Verdict.round)
    ).all()
    assert rounds == [1, 2]


def test_disagreement_goes_to_adjudication_and_adjudicator_decides(session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 1)
    r1, r2 = _reviewer(session), _reviewer(session)
    judge = _reviewer(session, is_adjudicator=True)
    plain = _reviewer(session)
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=r1, alert_id=a[0].id, label="confirmed", key=KEY)
    service.claim_next(session, reviewer=r2, key=KEY, gold_share=0)
    _fa(session, r2, a[0].id, cause="other_alarm_beep", resemblance="resembles", note="oven timer")
    assert session.get(Alert, a[0].id).state == AlertState.adjudication
    assert service.claim_next(session, reviewer=plain, key=KEY, gold_share=0).current is None

    with pytest.raises(Forbidden) as exc:
        service.list_adjudications(session, adjudicator=plain)
    assert exc.value.code == "not_adjudicator"
    r1.is_adjudicator = True
    with pytest.raises(queue.SameReviewer):  # a reviewer of the clip may not settle it
        service.adjudicate(session, adjudicator=r1, alert_id=a[0].id, label="confirmed")

    cases = service.list_adjudications(session, adjudicator=judge)
    assert [c.item.alert_id for c in cases] == [a[0].id]
    assert [(v.round, v.label, v.note) for v in cases[0].verdicts] == [
        (1, "confirmed", None),
        (2, "false_alarm", "oven timer"),
    ]
    service.adjudicate(
        session,
        adjudicator=judge,
        alert_id=a[0].id,
        label="false_alarm",
        cause="other_alarm_beep",
        resemblance="resembles",
    )
    alert = session.get(Alert, a[0].id)
    assert (alert.state, alert.final_label, alert.final_cause, alert.final_method) == (
        AlertState.final,
        "false_alarm",
        "other_alarm_beep",
        "adjudicated",
    )
    with pytest.raises(queue.NotInReview):
        service.adjudicate(session, adjudicator=judge, alert_id=a[0].id, label="confirmed")


def test_admin_may_adjudicate_even_after_reviewing(session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 1)
    admin = factories.make_user(session, role="admin")[0]
    r2 = _reviewer(session)
    service.claim_next(session, reviewer=admin, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=admin, alert_id=a[0].id, label="unsure", key=KEY)
    service.claim_next(session, reviewer=r2, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=r2, alert_id=a[0].id, label="unsure", key=KEY)
    # Two "unsure" are not a verdict that counts: adjudication.
    assert session.get(Alert, a[0].id).state == AlertState.adjudication
    service.adjudicate(session, adjudicator=admin, alert_id=a[0].id, label="unusable")
    assert session.get(Alert, a[0].id).final_method == "adjudicated"


# --- gold checks ------------------------------------------------------------------------------------


def test_gold_check_served_unannounced_and_scored(session, store, settings, trial):
    _no_second(trial, session)
    a = _alerts(session, store, settings, trial, 3)
    coord = factories.make_user(session, role="coordinator")[0]
    r1, r2 = _reviewer(session), _reviewer(session)
    # a[0] is decided by r1, then marked as gold with a known answer.
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    _fa(session, r1, a[0].id, cause="dog")
    gold = service.mark_gold(
        session, user=coord, alert_id=a[0].id, expected_label="false_alarm", expected_cause="dog"
    )
    view = service.claim_next(session, reviewer=r2, key=KEY, gold_share=1.0)
    assert view.current.alert_id == a[0].id  # served like any clip
    assert view.next.alert_id != a[0].id
    assert queue.get_review_item(session, reviewer=r2, alert_id=a[0].id).alert_id == a[0].id
    before = session.get(Alert, a[0].id).final_method
    got = _fa(session, r2, a[0].id, cause="cat_other_pet")  # right label, wrong cause
    assert got.alert_id == a[0].id and got.label == "false_alarm"
    answer = session.scalars(select(GoldAnswer).where(GoldAnswer.gold_check_id == gold.id)).one()
    assert (answer.reviewer_id, answer.correct) == (r2.id, False)
    alert = session.get(Alert, a[0].id)
    assert alert.final_cause == "dog" and alert.final_method == before  # the alert is untouched
    assert session.scalars(select(Verdict).where(Verdict.alert_id == a[0].id)).all()[0].reviewer_id == r1.id
    # Answered once: not served again; r1 (who decided the clip) never gets it.
    assert service.claim_next(session, reviewer=r2, key=KEY, gold_share=1.0).current.alert_id != a[0].id
    assert all(
        i.alert_id != a[0].id
        for i in (service.claim_next(session, reviewer=r1, key=KEY, gold_share=1.0).current,)
        if i is not None
    )
    with pytest.raises(queue.NotInReview):
        _fa(session, r2, a[0].id)


def test_gold_check_on_pending_clip_scores_the_ordinary_verdict(session, store, settings, trial):
    _no_second(trial, session)
    a = _alerts(session, store, settings, trial, 1)
    coord = factories.make_user(session, role="coordinator")[0]
    gold = service.mark_gold(session, user=coord, alert_id=a[0].id, expected_label="confirmed")
    r = _reviewer(session)
    service.claim_next(session, reviewer=r, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=r, alert_id=a[0].id, label="confirmed", key=KEY)
    answer = session.scalars(select(GoldAnswer).where(GoldAnswer.gold_check_id == gold.id)).one()
    assert answer.correct is True
    assert session.get(Alert, a[0].id).final_method == "single"


def test_mark_gold_rules(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    coord = factories.make_user(session, role="coordinator")[0]
    with pytest.raises(ValidationFailed):
        service.mark_gold(
            session, user=coord, alert_id=a[0].id, expected_label="confirmed", expected_cause="dog"
        )
    service.mark_gold(session, user=coord, alert_id=a[0].id, expected_label="confirmed")
    with pytest.raises(Exception) as exc:
        service.mark_gold(session, user=coord, alert_id=a[0].id, expected_label="unusable")
    assert getattr(exc.value, "code", None) == "gold_exists"


# --- private content -------------------------------------------------------------------------------


def test_private_flag_hides_clip_from_everyone_but_admins(session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 2)
    r1, r2 = _reviewer(session), _reviewer(session)
    admin = factories.make_user(session, role="admin")[0]
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    got = service.record_verdict(
        session, reviewer=r1, alert_id=a[0].id, label="confirmed", private=True, key=KEY
    )
    assert got.private is True
    alert = session.get(Alert, a[0].id)
    # Nobody else should hear it, so no random second review.
    assert alert.private_flag and alert.private_flagged_by_id == r1.id
    assert alert.state == AlertState.final and alert.final_method == "single"
    with pytest.raises(queue.PrivateContent) as exc:
        queue.get_review_item(session, reviewer=r2, alert_id=a[0].id)
    assert exc.value.status == 403 and exc.value.code == "private_content"
    assert [c.id for c in service.list_private_clips_to_purge(session)] == [alert.clip_id]
    # Flagged while still in review: only admins are handed it.
    service.flag_private(session, user=r1, alert_id=a[1].id)
    assert service.claim_next(session, reviewer=r2, key=KEY, gold_share=0).current is None
    assert service.claim_next(session, reviewer=admin, key=KEY, gold_share=0).current.alert_id == a[1].id
    assert {c.id for c in service.list_private_clips_to_purge(session)} == {a[0].clip_id, a[1].clip_id}


def test_private_and_unsure_goes_to_adjudication_for_admins(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    r1 = _reviewer(session)
    judge = _reviewer(session, is_adjudicator=True)
    admin = factories.make_user(session, role="admin")[0]
    service.claim_next(session, reviewer=r1, key=KEY, gold_share=0)
    service.record_verdict(session, reviewer=r1, alert_id=a[0].id, label="unsure", private=True, key=KEY)
    assert session.get(Alert, a[0].id).state == AlertState.adjudication
    assert service.list_adjudications(session, adjudicator=judge) == []
    with pytest.raises(queue.PrivateContent):
        service.adjudicate(session, adjudicator=judge, alert_id=a[0].id, label="confirmed")
    assert [c.private for c in service.list_adjudications(session, adjudicator=admin)] == [True]


def test_erased_clip_is_not_handed_out(session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 2)
    from server.devices import service as devices_service

    devices_service.mark_clip_erased(session, a[0].clip, "withdrawal")
    session.expire_all()
    r = _reviewer(session)
    v = service.claim_next(session, reviewer=r, key=KEY, gold_share=0)
    assert v.current.alert_id == a[1].id and v.next is None


def test_clip_of_home_without_listening_consent_is_not_handed_out(session, store, settings, trial):
    from server.households.models import Consent

    device, _ = factories.make_device(session, trial)
    home = factories.make_home(session, trial)
    factories.make_installation(session, device, home, installed_at=T0 - dt.timedelta(days=1))
    alert = factories.make_alert(session, store, settings, device, now=T0, detected_at=T0)
    session.add(
        Consent(
            home_id=home.id,
            form_version="v1",
            consented_on=T0.date(),
            staff_may_listen=True,
            recorded_at=T0 - dt.timedelta(days=1),
        )
    )
    session.add(
        Consent(
            home_id=home.id, form_version="v2", consented_on=T0.date(), staff_may_listen=False, recorded_at=T0
        )
    )
    session.flush()
    r = _reviewer(session)
    assert service.claim_next(session, reviewer=r, key=KEY, gold_share=0).current is None
    # A newer consent that allows listening puts it back in the queue.
    session.add(
        Consent(
            home_id=home.id,
            form_version="v3",
            consented_on=T0.date(),
            staff_may_listen=True,
            recorded_at=T0 + dt.timedelta(minutes=5),
        )
    )
    session.flush()
    assert service.claim_next(session, reviewer=r, key=KEY, gold_share=0).current.alert_id == alert.id


def test_simultaneous_claims_never_hand_one_clip_to_two_reviewers(fresh_settings):
    import threading

    from server.db import make_engine, make_session_factory, writer_engine
    from server.devices.clipstore import ClipStore
    from tests.conftest import committed_session

    store = ClipStore(fresh_settings.clip_dir)
    store.ensure()
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        trial.second_review_share = 0.0
        _alerts(s, store, fresh_settings, trial, 12)
        reviewers = [_reviewer(s).id for _ in range(4)]
    engine = make_engine(fresh_settings.resolved_database_url())
    factory = make_session_factory(writer_engine(engine))
    barrier = threading.Barrier(len(reviewers))
    got: dict[int, list[int]] = {}
    errors: list[BaseException] = []

    def work(rid: int) -> None:
        try:
            from server.auth.models import User

            barrier.wait(timeout=30)  # before any statement: SQLite writers take their lock at BEGIN
            with factory() as s:
                user = s.get(User, rid)
                view = service.claim_next(s, reviewer=user, key=KEY, gold_share=0)
                s.commit()
                got[rid] = [i.alert_id for i in (view.current, view.next) if i is not None]
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(rid,)) for rid in reviewers]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    engine.dispose()
    assert errors == []
    handed = [a for ids in got.values() for a in ids]
    assert len(handed) == 8 and len(set(handed)) == 8
    with committed_session(fresh_settings) as s:
        owners = dict(
            s.execute(select(Alert.id, Alert.claimed_by_id).where(Alert.claimed_by_id.is_not(None))).all()
        )
    assert {a: r for r, ids in got.items() for a in ids} == owners


# --- the random draw behind the agreement sample ------------------------------------------------------


def _first_verdicts(session, alerts, reviewer, labels, private=()):
    """First verdicts without claims: nobody else holds these clips."""
    for i, (a, label) in enumerate(zip(alerts, labels, strict=True)):
        service.record_verdict(
            session,
            reviewer=reviewer,
            alert_id=a.id,
            label=label,
            cause="dog" if label == "false_alarm" else None,
            resemblance="unrelated" if label == "false_alarm" else None,
            private=i in private,
            key=KEY,
        )


def test_first_verdict_records_the_random_draw_whatever_its_label(session, store, settings, trial):
    trial.second_review_share = 0.5
    session.flush()
    a = _alerts(session, store, settings, trial, 16)
    r1, r2 = _reviewer(session), _reviewer(session)
    admin = factories.make_user(session, role="admin")[0]
    labels = ["unsure" if i % 2 else "false_alarm" for i in range(16)]
    _first_verdicts(session, a[:15], r1, labels[:15])
    _first_verdicts(session, a[15:], admin, ["false_alarm"], private={0})
    drawn = {x.id: queue.chosen_for_second_review(KEY, x.id, 0.5) for x in a}
    recorded = {v.alert_id: v.random_draw for v in session.scalars(select(Verdict).where(Verdict.round == 1))}
    # Private clips are never in the sample; every other first verdict carries the keyed draw.
    assert recorded == {**drawn, a[15].id: False}
    # Both kinds of unsure verdict occur here, and every unsure one is sent on regardless.
    assert {drawn[x.id] for x, lab in zip(a[:15], labels, strict=False) if lab == "unsure"} == {True, False}
    for x, lab in zip(a[:15], labels[:15], strict=True):
        alert = session.get(Alert, x.id)
        assert alert.needs_second_review == (lab == "unsure" or drawn[x.id])
    # The second verdict carries no draw of its own.
    sent_on = next(x for x in a[:15] if session.get(Alert, x.id).state == AlertState.second_review)
    _fa(session, r2, sent_on.id)
    second = session.scalar(select(Verdict).where(Verdict.alert_id == sent_on.id, Verdict.round == 2))
    assert second.random_draw is None


def test_overview_measures_agreement_on_the_drawn_sample_only(session, store, settings, trial):
    from sklearn.metrics import cohen_kappa_score

    from server.review import overview

    trial.second_review_share = 0.5
    session.flush()
    a = _alerts(session, store, settings, trial, 24)
    r1, r2 = _reviewer(session), _reviewer(session)
    labels = ["unsure" if i % 3 == 0 else "false_alarm" for i in range(24)]
    _first_verdicts(session, a, r1, labels)
    first, second = [], []
    for x, lab in zip(a, labels, strict=True):
        if session.get(Alert, x.id).state != AlertState.second_review:
            continue
        answer = "confirmed" if x.id % 2 else "false_alarm"
        if answer == "false_alarm":
            _fa(session, r2, x.id)
        else:
            service.record_verdict(session, reviewer=r2, alert_id=x.id, label=answer, key=KEY)
        if queue.chosen_for_second_review(KEY, x.id, 0.5):
            first.append(lab)
            second.append(answer)
    ov = overview.review_overview(session, trial.id)
    assert ov.double_reviewed == len(first) and 0 < len(first) < ov.pooled_double_reviewed
    assert ov.sample_drawn == sum(queue.chosen_for_second_review(KEY, x.id, 0.5) for x in a)
    # Reference: scikit-learn's cohen_kappa_score on the drawn pairs only.
    assert ov.kappa_overall.estimate == pytest.approx(
        cohen_kappa_score(first, second, labels=["confirmed", "false_alarm", "unsure", "unusable"]),
        abs=1e-12,
    )
    u = ov.unsure_resolution
    assert u.first_unsure == 8 and u.drawn == sum(
        queue.chosen_for_second_review(KEY, x.id, 0.5)
        for x, lab in zip(a, labels, strict=True)
        if lab == "unsure"
    )
    assert sum(u.second_said.values()) == 8 and u.awaiting_adjudication == 8
    assert overview.agreement_brief(session, trial.id).unsure_resolution == u


def test_migration_back_fills_the_draw_as_the_queue_records_it(fresh_settings):
    import importlib.util

    from sqlalchemy import update

    from server.db import make_engine
    from server.devices.clipstore import ClipStore
    from server.migrate import MIGRATIONS_DIR
    from tests.conftest import committed_session

    MIGRATIONS = MIGRATIONS_DIR / "versions"
    store = ClipStore(fresh_settings.clip_dir)
    store.ensure()
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        trial.second_review_share = 0.5
        s.flush()
        a = _alerts(s, store, fresh_settings, trial, 14)
        r1 = _reviewer(s)
        admin = factories.make_user(s, role="admin")[0]
        _first_verdicts(s, a[:12], r1, ["unsure" if i % 2 else "confirmed" for i in range(12)])
        _first_verdicts(s, a[12:], admin, ["unsure", "confirmed"], private={0, 1})
    with committed_session(fresh_settings) as s:
        written = dict(s.execute(select(Verdict.alert_id, Verdict.random_draw)).all())
    assert set(written.values()) == {True, False}

    # The schema steps are covered by test_migrations; here the back-fill runs on the rows as
    # they stand, with the draw wiped first.
    spec = importlib.util.spec_from_file_location("step_0008", MIGRATIONS / "2026-12-03_0008_random_draw.py")
    step = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(step)
    engine = make_engine(fresh_settings.resolved_database_url())
    try:
        with engine.begin() as conn:
            conn.execute(update(Verdict).values(random_draw=None))
            step.back_fill(conn, lambda: KEY)
    finally:
        engine.dispose()
    with committed_session(fresh_settings) as s:
        back_filled = dict(s.execute(select(Verdict.alert_id, Verdict.random_draw)).all())
    assert back_filled == written
