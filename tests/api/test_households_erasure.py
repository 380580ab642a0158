"""Withdrawal with erasure (two steps, irreversible) and the purge of clips past retention."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import re

from sqlalchemy import func, select

from server.auth.models import AuditEvent
from server.devices.models import Alert, Clip
from server.households import erasure, service
from server.households.models import HomeContact, HomeStateChange
from server.review.models import Verdict
from tests import factories
from tests.conftest import csrf_of


def json_client(staff_client, role="coordinator"):  # type: ignore[no-untyped-def]
    c = staff_client(role)
    c.headers["X-CSRF-Token"] = csrf_of(c)
    return c


def day(n: int, hour: int = 9) -> dt.datetime:
    start = (dt.datetime.now(dt.UTC) - dt.timedelta(days=60)).replace(
        hour=0, minute=0, second=0, microsecond=0
    )
    return start + dt.timedelta(days=n, hours=hour)


def household_with_clips(session, settings, store, trial, *, retention_days=90):  # type: ignore[no-untyped-def]
    device, token = factories.make_device(session, trial)
    device.test_token = token  # for tests that post as the device
    home = factories.make_installed_home(
        session, trial, device, installed_at=day(1), retention_days=retention_days
    )
    service.set_contact(
        session,
        home,
        names="Cleo Sample",
        address="1 Sample Row",
        phone="0161 496 0000",
        email="cleo@example.test",
        access_notes="key with neighbour",
    )
    service.transition(session, home, "paused", at=day(2), note="Cleo asked for a pause")
    service.transition(session, home, "active", at=day(3))
    alerts = [
        factories.make_alert(
            session, store, settings, device, detected_at=day(4, h), sound_class=cls, score=sc
        )
        for h, cls, sc in [(10, "smoke_alarm", 0.91), (11, "baby_cry", 0.77)]
    ]
    reviewer, _ = factories.make_user(session, role="reviewer")
    session.add(
        Verdict(
            alert_id=alerts[0].id,
            reviewer_id=reviewer.id,
            round=1,
            label="false_alarm",
            cause="speech",
            note="heard someone say their name",
        )
    )
    alerts[0].final_label, alerts[0].final_cause, alerts[0].state = "false_alarm", "speech", "final"
    session.flush()
    return device, home, alerts


def test_erasure_removes_personal_data_and_clips_but_keeps_the_counts(
    staff_client, session, settings, store, trial
):
    c = json_client(staff_client)
    device, home, alerts = household_with_clips(session, settings, store, trial)
    paths = [store.path(a.clip.storage_key) for a in alerts]
    assert all(p.exists() for p in paths)
    n_alerts = session.scalar(select(func.count(Alert.id)).where(Alert.home_id == home.id))

    plan = c.get(f"/api/v1/homes/{home.code}/erasure").json()
    assert plan["clips_to_delete"] == 2 and plan["alerts_kept"] == 2
    assert any("contact details" in line for line in plan["will_erase"])
    assert any("de-identified alert record" in line for line in plan["will_keep"])
    # Step 2 without the first step's ticket, or with the wrong code, does nothing.
    r = c.post(f"/api/v1/homes/{home.code}/erasure", json={"ticket": "123.abc", "confirm_code": home.code})
    assert r.status_code == 409 and r.json()["error"]["code"] == "erasure_not_confirmed"
    r = c.post(
        f"/api/v1/homes/{home.code}/erasure", json={"ticket": plan["ticket"], "confirm_code": "H-0000"}
    )
    assert r.status_code == 422 and "confirm_code" in r.json()["error"]["fields"]
    assert all(p.exists() for p in paths)

    r = c.post(
        f"/api/v1/homes/{home.code}/erasure", json={"ticket": plan["ticket"], "confirm_code": home.code}
    )
    assert r.status_code == 200, r.text
    assert r.json() == {
        "code": home.code,
        "complete": True,
        "contact_erased": True,
        "clips_deleted": 2,
        "clips_shared_kept": 0,
        "alerts_kept": 2,
    }
    assert not any(p.exists() for p in paths)
    assert list(store.iter_keys()) == []
    session.expire_all()
    assert session.scalar(select(HomeContact).where(HomeContact.home_id == home.id)) is None
    clips = session.scalars(select(Clip).where(Clip.id.in_([a.clip_id for a in alerts]))).all()
    assert {(cl.erased_reason, cl.erased_at is not None) for cl in clips} == {("erasure", True)}
    kept = session.scalars(select(Alert).where(Alert.home_id == home.id).order_by(Alert.detected_at)).all()
    assert len(kept) == n_alerts == 2
    assert [(a.sound_class, a.score, a.final_label) for a in kept] == [
        ("smoke_alarm", 0.91, "false_alarm"),
        ("baby_cry", 0.77, None),
    ]
    v = session.scalar(select(Verdict).where(Verdict.alert_id == alerts[0].id))
    assert v is not None and v.label == "false_alarm" and v.note is None
    notes = session.scalars(select(HomeStateChange.note).where(HomeStateChange.home_id == home.id)).all()
    assert set(notes) == {None}
    refreshed = service.get_home(session, home.code)
    assert refreshed.state == "withdrawn" and refreshed.erased_at is not None
    ev = session.scalar(select(AuditEvent).where(AuditEvent.action == "home.erase"))
    assert ev is not None and ev.detail["clips_deleted"] == 2 and ev.actor_id == c.user.id  # type: ignore[attr-defined]
    # Irreversible: no new contact details, the clip is gone for listeners.
    r = c.put(f"/api/v1/homes/{home.code}/contact", json={"names": "Cleo Sample"})
    assert r.status_code == 409
    assert c.get(f"/clips/{alerts[0].id}/audio").status_code == 410
    assert c.get("/api/v1/health").status_code == 200


def test_clip_shared_with_another_home_is_kept(session, settings, store, trial):
    clip_bytes = factories.sine_wav(seed=4242)
    d1, _ = factories.make_device(session, trial)
    d2, _ = factories.make_device(session, trial)
    h1 = factories.make_installed_home(session, trial, d1, installed_at=day(1))
    h2 = factories.make_installed_home(session, trial, d2, installed_at=day(1))
    a1 = factories.make_alert(session, store, settings, d1, detected_at=day(5), clip=clip_bytes)
    a2 = factories.make_alert(session, store, settings, d2, detected_at=day(5), clip=clip_bytes)
    own = factories.make_alert(session, store, settings, d1, detected_at=day(6))
    assert a1.clip_id == a2.clip_id and (a1.home_id, a2.home_id) == (h1.id, h2.id)
    plan = erasure.plan_erasure(session, h1)
    assert (plan.clips_to_delete, plan.clips_shared) == (1, 1)
    ticket = erasure.erasure_ticket("s3cret", h1)
    r = erasure.erase_home(
        session, store, h1, secret="s3cret", ticket=ticket, confirm_code=h1.code, actor="cli"
    )
    assert (r.clips_deleted, r.clips_shared, r.complete) == (1, 1, True)
    assert store.exists(a2.clip.storage_key) and not store.exists(own.clip.storage_key)
    assert session.get(Clip, a2.clip_id).erased_at is None  # type: ignore[union-attr]


def test_ticket_expires_and_belongs_to_one_home(session, store, trial):
    h1 = factories.make_registered_home(session, trial, state="consented")
    h2 = factories.make_registered_home(session, trial, state="consented")
    t0 = dt.datetime.now(dt.UTC)
    ticket = erasure.erasure_ticket("k", h1, now=t0)
    for home, now in [(h2, t0), (h1, t0 + erasure.TICKET_TTL + dt.timedelta(seconds=1))]:
        try:
            erasure.erase_home(
                session, store, home, secret="k", ticket=ticket, confirm_code=home.code, actor="cli", now=now
            )
        except erasure.ErasureNotConfirmed as exc:
            assert exc.status == 409
        else:
            raise AssertionError("a foreign or expired ticket was accepted")
    assert h1.erased_at is None and h2.erased_at is None


def test_erasure_pages_take_two_steps(staff_client, session, settings, store, trial):
    c = staff_client("coordinator")
    _, home, alerts = household_with_clips(session, settings, store, trial)
    page = c.get(f"/homes/{home.code}/erase")
    assert page.status_code == 200
    erase_block = re.search(r'id="will-erase">(.*?)</div>', page.text, re.S)
    keep_block = re.search(r'id="will-keep">(.*?)</div>', page.text, re.S)
    assert erase_block and "2 audio clip files" in erase_block.group(1)
    assert keep_block and "2 de-identified alert records" in keep_block.group(1)
    token = csrf_of(c, f"/homes/{home.code}/erase")
    r = c.post(f"/homes/{home.code}/erase/review", data={"csrf_token": token, "confirm_code": "nope"})
    assert r.status_code == 422 and 'id="err-confirm_code"' in r.text and 'id="erase-step-2"' not in r.text
    r = c.post(
        f"/homes/{home.code}/erase/review", data={"csrf_token": token, "confirm_code": home.code.lower()}
    )
    assert r.status_code == 200 and 'id="erase-step-2"' in r.text
    ticket = re.search(r'name="ticket" value="([^"]+)"', r.text)
    assert ticket and store.exists(alerts[0].clip.storage_key)  # nothing happened yet
    r = c.post(
        f"/homes/{home.code}/erase",
        data={"csrf_token": token, "ticket": ticket.group(1), "confirm_code": home.code},
        follow_redirects=False,
    )
    assert r.status_code == 303
    assert not store.exists(alerts[0].clip.storage_key)
    detail = c.get(f"/homes/{home.code}").text
    assert "was withdrawn and erased" in detail and "Cleo" not in detail


def test_purge_is_a_dry_run_unless_applied(session, settings, store, trial):
    now = dt.datetime.now(dt.UTC)
    d1, _ = factories.make_device(session, trial)
    d2, _ = factories.make_device(session, trial)
    d3, _ = factories.make_device(session, trial)
    short = factories.make_installed_home(session, trial, d1, installed_at=day(1), retention_days=7)
    factories.make_installed_home(session, trial, d2, installed_at=day(1), retention_days=365)
    old = factories.make_alert(session, store, settings, d1, detected_at=day(10), now=day(10))
    fresh = factories.make_alert(
        session, store, settings, d1, detected_at=now - dt.timedelta(days=2), now=now - dt.timedelta(days=2)
    )
    long_kept = factories.make_alert(session, store, settings, d2, detected_at=day(10), now=day(10))
    private = factories.make_alert(session, store, settings, d2, detected_at=day(11), now=day(11))
    private.private_flag = True
    unassigned = factories.make_alert(session, store, settings, d3, detected_at=day(10), now=day(10))
    session.flush()
    dry = erasure.purge_clips(session, store, now=now)
    # The unassigned clip is past the trial's 30 days for clips with no home.
    assert sorted((i.clip_id, i.reason) for i in dry.items) == sorted(
        [(old.clip_id, "retention"), (private.clip_id, "private"), (unassigned.clip_id, "no_home")]
    )
    assert dry.waiting_no_home == 0 and dry.deleted == 0 and not dry.applied
    assert store.exists(old.clip.storage_key) and store.exists(private.clip.storage_key)
    done = erasure.purge_clips(session, store, now=now, apply=True)
    assert done.deleted == 3 and done.by_reason == {"private": 1, "retention": 1, "no_home": 1}
    assert not store.exists(old.clip.storage_key) and not store.exists(private.clip.storage_key)
    assert not store.exists(unassigned.clip.storage_key)
    for a in (fresh, long_kept):
        assert store.exists(a.clip.storage_key)
    assert session.get(Clip, old.clip_id).erased_reason == "retention"  # type: ignore[union-attr]
    assert session.get(Clip, private.clip_id).erased_reason == "private"  # type: ignore[union-attr]
    assert erasure.purge_clips(session, store, now=now).items == ()
    assert short.erased_at is None  # purging clips is not erasing the home


# --- erasure that stays erased --------------------------------------------------------------------

BOUNDARY = "erasure-test-5c1d"


def post_clip(client, token: str, clip: bytes, detected_at: dt.datetime, event_id: str):  # type: ignore[no-untyped-def]
    """A device upload with the clip part first: the server spools it before it reads the meta."""
    meta = json.dumps(
        {
            "event_id": event_id,
            "sound_class": "smoke_alarm",
            "score": 0.8,
            "detected_at": detected_at.isoformat(),
            "clip_offset_s": 0.2,
            "firmware": "1.0.0",
        }
    ).encode()
    body = (
        f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="clip"; filename="c.wav"\r\n\r\n'.encode()
        + clip
        + f'\r\n--{BOUNDARY}\r\nContent-Disposition: form-data; name="meta"\r\n\r\n'.encode()
        + meta
        + f"\r\n--{BOUNDARY}--\r\n".encode()
    )
    return client.post(
        "/api/v1/alerts",
        content=body,
        headers={
            "Content-Type": f"multipart/form-data; boundary={BOUNDARY}",
            "Authorization": f"Bearer {token}",
        },
    )


def erase_via_api(c, home):  # type: ignore[no-untyped-def]
    plan = c.get(f"/api/v1/homes/{home.code}/erasure").json()
    r = c.post(
        f"/api/v1/homes/{home.code}/erasure", json={"ticket": plan["ticket"], "confirm_code": home.code}
    )
    assert r.status_code == 200, r.text
    return plan, r.json()


def test_late_clip_of_an_erased_home_is_refused_and_a_second_erasure_cleans_up(
    staff_client, client, session, settings, store, trial
):
    c = json_client(staff_client)
    device, home, alerts = household_with_clips(session, settings, store, trial)
    _, first = erase_via_api(c, home)
    assert first["clips_deleted"] == 2
    session.expire_all()
    erased_at = service.get_home(session, home.code).erased_at
    assert erased_at is not None
    n_alerts = session.scalar(select(func.count(Alert.id)))
    n_clips = session.scalar(select(func.count(Clip.id)))

    # The device buffered a detection from inside the home while offline and sends it now.
    late = factories.sine_wav(seed=9191)
    r = post_clip(client, device.test_token, late, day(5), "buffered-1")
    assert r.status_code == 410, r.text
    assert r.json()["error"]["code"] == "home_erased"
    assert "Do not send it again" in r.json()["error"]["message"]
    assert list(store.iter_keys()) == []  # not a byte reached the store
    assert sorted(p.name for p in store.tmp.iterdir()) == []  # and its spool is gone
    session.expire_all()
    assert session.scalar(select(func.count(Alert.id))) == n_alerts
    assert session.scalar(select(func.count(Clip.id))) == n_clips
    # The answer is the same on a resend (the device may have missed it): still final, still nothing.
    r = post_clip(client, device.test_token, late, day(5), "buffered-1")
    assert (r.status_code, r.json()["error"]["code"]) == (410, "home_erased")
    assert list(store.iter_keys()) == []

    # The device itself stays registered for reuse: what it hears after the home's end is unassigned.
    r = post_clip(
        client, device.test_token, factories.sine_wav(seed=9192), dt.datetime.now(dt.UTC), "after-1"
    )
    assert r.status_code == 201, r.text
    assert session.get(Alert, r.json()["alert_id"]).home_id is None  # type: ignore[union-attr]

    # A reviewer note that arrived since the erasure; the second erasure clears it and succeeds.
    reviewer, _ = factories.make_user(session, role="reviewer")
    session.add(
        Verdict(alert_id=alerts[1].id, reviewer_id=reviewer.id, round=1, label="confirmed", note="new note")
    )
    session.flush()
    plan2, second = erase_via_api(c, home)
    assert (plan2["clips_to_delete"], plan2["alerts_kept"]) == (0, 2)
    assert second == {
        "code": home.code,
        "complete": True,
        "contact_erased": False,
        "clips_deleted": 0,
        "clips_shared_kept": 0,
        "alerts_kept": 2,
    }
    session.expire_all()
    notes = session.scalars(select(Verdict.note).where(Verdict.alert_id.in_([a.id for a in alerts]))).all()
    assert set(notes) == {None}
    assert service.get_home(session, home.code).erased_at == erased_at  # the first erasure's date stays
    events = session.scalars(select(AuditEvent).where(AuditEvent.action == "home.erase")).all()
    assert [e.detail["repeat"] for e in events] == [False, True]
    assert events[1].detail["verdict_notes_cleared"] == 1
    assert client.get("/api/v1/health").status_code == 200


def _note_count(session, home) -> tuple[int, int]:  # type: ignore[no-untyped-def]
    session.expire_all()
    alert_ids = select(Alert.id).where(Alert.home_id == home.id)
    verdicts = session.scalar(
        select(func.count(Verdict.id)).where(
            Verdict.alert_id.in_(alert_ids), Verdict.note.is_not(None), Verdict.note != ""
        )
    )
    timeline = session.scalar(
        select(func.count(HomeStateChange.id)).where(
            HomeStateChange.home_id == home.id, HomeStateChange.note.is_not(None), HomeStateChange.note != ""
        )
    )
    return verdicts or 0, timeline or 0


def test_plan_counts_are_what_the_erasure_removes(session, settings, store, trial):
    device, home, alerts = household_with_clips(session, settings, store, trial)
    # One clip's bytes also belong to another home's alert; one reviewer note is blank.
    other_dev, _ = factories.make_device(session, trial)
    factories.make_installed_home(session, trial, other_dev, installed_at=day(1))
    shared_bytes = factories.sine_wav(seed=5151)
    mine = factories.make_alert(session, store, settings, device, detected_at=day(6), clip=shared_bytes)
    theirs = factories.make_alert(session, store, settings, other_dev, detected_at=day(6), clip=shared_bytes)
    reviewer, _ = factories.make_user(session, role="reviewer")
    session.add(Verdict(alert_id=alerts[1].id, reviewer_id=reviewer.id, round=1, label="unsure", note=""))
    session.flush()

    plan = erasure.plan_erasure(session, home)
    files_before = set(store.iter_keys())
    notes_before = _note_count(session, home)
    assert (plan.clips_to_delete, plan.clips_shared, plan.alerts_kept) == (2, 1, 3)
    # One reviewer note (the blank one holds nothing), and the notes of the timeline's steps.
    assert (plan.verdict_notes, plan.timeline_notes) == notes_before and notes_before[0] == 1
    assert notes_before[1] >= 2

    ticket = erasure.erasure_ticket("k", home)
    r = erasure.erase_home(
        session, store, home, secret="k", ticket=ticket, confirm_code=home.code, actor="cli"
    )
    removed_files = files_before - set(store.iter_keys())
    notes_after = _note_count(session, home)
    assert r.complete and not r.repeat
    assert len(removed_files) == r.clips_deleted == plan.clips_to_delete
    assert r.clips_shared == plan.clips_shared
    assert (
        r.alerts_kept
        == plan.alerts_kept
        == session.scalar(select(func.count(Alert.id)).where(Alert.home_id == home.id))
    )
    assert notes_after == (0, 0)
    assert (r.verdict_notes, r.timeline_notes) == (plan.verdict_notes, plan.timeline_notes) == notes_before
    assert r.contact_erased == plan.has_contact is True
    # The shared file stays for the other home only.
    assert store.exists(theirs.clip.storage_key)
    session.expire_all()
    assert session.get(Alert, mine.id).clip.erased_at is not None  # type: ignore[union-attr]
    assert session.get(Alert, theirs.id).clip.erased_at is None  # type: ignore[union-attr]


def test_erased_audio_stays_erased_when_identical_bytes_arrive_again(
    staff_client, client, session, settings, store, trial
):
    c = json_client(staff_client)
    d1, t1 = factories.make_device(session, trial)
    d2, t2 = factories.make_device(session, trial)
    d3, t3 = factories.make_device(session, trial)
    h1 = factories.make_installed_home(session, trial, d1, installed_at=day(1))
    h2 = factories.make_installed_home(session, trial, d2, installed_at=day(1))
    own_bytes, shared_bytes = factories.sine_wav(seed=7001), factories.sine_wav(seed=7002)
    a_own = factories.make_alert(session, store, settings, d1, detected_at=day(4), clip=own_bytes)
    a_shared = factories.make_alert(session, store, settings, d1, detected_at=day(4, 10), clip=shared_bytes)
    b_shared = factories.make_alert(session, store, settings, d2, detected_at=day(4, 10), clip=shared_bytes)
    assert a_shared.clip_id == b_shared.clip_id and (a_own.home_id, b_shared.home_id) == (h1.id, h2.id)
    erase_via_api(c, h1)
    for alert_id in (a_own.id, a_shared.id):
        r = c.get(f"/api/v1/alerts/{alert_id}/clip")
        assert (r.status_code, r.json()["error"]["code"]) == (410, "clip_erased")
    assert (
        c.get(f"/api/v1/alerts/{b_shared.id}/clip").content == shared_bytes
    )  # the other home keeps its audio

    # The same bytes come again from a device in no home: a new alert with a clip row of its own.
    r = post_clip(client, t3, own_bytes, dt.datetime.now(dt.UTC), "again-1")
    assert r.status_code == 201, r.text
    again = r.json()["alert_id"]
    assert c.get(f"/api/v1/alerts/{again}/clip").content == own_bytes
    for alert_id in (a_own.id, a_shared.id):
        r = c.get(f"/api/v1/alerts/{alert_id}/clip")
        assert (r.status_code, r.json()["error"]["code"]) == (410, "clip_erased")
        assert c.get(f"/review/images/{alert_id}/meta.json").status_code == 410
    session.expire_all()
    rows = session.scalars(select(Clip).where(Clip.sha256 == hashlib.sha256(own_bytes).hexdigest())).all()
    assert sorted((cl.erased_reason or "live") for cl in rows) == ["erasure", "live"]
    # A purged clip stays purged too: flag the new alert private, purge, send the bytes once more.
    session.get(Alert, again).private_flag = True  # type: ignore[union-attr]
    session.flush()
    assert erasure.purge_clips(session, store, apply=True).by_reason["private"] == 1
    r = post_clip(client, t2, own_bytes, dt.datetime.now(dt.UTC), "again-2")
    assert r.status_code == 201, r.text
    assert c.get(f"/api/v1/alerts/{r.json()['alert_id']}/clip").content == own_bytes
    for alert_id in (a_own.id, again):
        assert c.get(f"/api/v1/alerts/{alert_id}/clip").status_code == 410
    # The repeat erasure of h1 finds nothing new to remove (the new alerts are not h1's).
    _, repeat = erase_via_api(c, h1)
    assert (repeat["clips_deleted"], repeat["alerts_kept"]) == (0, 2)
    assert c.get(f"/api/v1/alerts/{b_shared.id}/clip").status_code == 200


def test_erase_page_offers_a_repeat_only_when_something_arrived_since(
    staff_client, session, settings, store, trial
):
    c = staff_client("coordinator")
    _, home, alerts = household_with_clips(session, settings, store, trial)
    erase_via_api(json_client(staff_client), home)
    page = c.get(f"/homes/{home.code}/erase")
    assert page.status_code == 200
    assert "nothing left to erase" in page.text and 'id="erase-step-1"' not in page.text
    token = csrf_of(c, f"/homes/{home.code}/erase")
    r = c.post(f"/homes/{home.code}/erase/review", data={"csrf_token": token, "confirm_code": home.code})
    assert r.status_code == 422 and "nothing left to erase" in r.text and 'id="erase-step-2"' not in r.text

    # A reviewer note added after the erasure: the page offers the repeat, which clears it.
    reviewer, _ = factories.make_user(session, role="reviewer")
    session.add(Verdict(alert_id=alerts[1].id, reviewer_id=reviewer.id, round=1, label="confirmed", note="x"))
    session.flush()
    page = c.get(f"/homes/{home.code}/erase")
    assert "Since then 1 item(s) arrived" in page.text and 'id="erase-step-1"' in page.text
    r = c.post(f"/homes/{home.code}/erase/review", data={"csrf_token": token, "confirm_code": home.code})
    assert r.status_code == 200 and 'id="erase-step-2"' in r.text
    ticket = re.search(r'name="ticket" value="([^"]+)"', r.text)
    assert ticket
    r = c.post(
        f"/homes/{home.code}/erase",
        data={"csrf_token": token, "ticket": ticket.group(1), "confirm_code": home.code},
        follow_redirects=False,
    )
    assert r.status_code == 303
    assert _note_count(session, home) == (0, 0)
