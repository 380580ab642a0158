"""Withdrawal with erasure (two steps, irreversible) and the purge of clips past retention."""

from __future__ import annotations

import datetime as dt
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
    device, _ = factories.make_device(session, trial)
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
    # Irreversible: no second erasure, no new contact details, the clip is gone for listeners.
    plan2 = c.get(f"/api/v1/homes/{home.code}/erasure").json()
    r = c.post(
        f"/api/v1/homes/{home.code}/erasure", json={"ticket": plan2["ticket"], "confirm_code": home.code}
    )
    assert r.status_code == 409 and r.json()["error"]["code"] == "home_erased"
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
    assert sorted((i.clip_id, i.reason) for i in dry.items) == sorted(
        [(old.clip_id, "retention"), (private.clip_id, "private")]
    )
    assert dry.kept_without_consent == 1 and dry.deleted == 0 and not dry.applied
    assert store.exists(old.clip.storage_key) and store.exists(private.clip.storage_key)
    done = erasure.purge_clips(session, store, now=now, apply=True)
    assert done.deleted == 2 and done.by_reason == {"private": 1, "retention": 1}
    assert not store.exists(old.clip.storage_key) and not store.exists(private.clip.storage_key)
    for a in (fresh, long_kept, unassigned):
        assert store.exists(a.clip.storage_key)
    assert session.get(Clip, old.clip_id).erased_reason == "retention"  # type: ignore[union-attr]
    assert session.get(Clip, private.clip_id).erased_reason == "private"  # type: ignore[union-attr]
    assert erasure.purge_clips(session, store, now=now).items == ()
    assert short.erased_at is None  # purging clips is not erasing the home
