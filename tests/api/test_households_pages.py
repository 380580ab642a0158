"""Register pages: the list, forms with messages beside the fields, the home page and its forms."""

from __future__ import annotations

import datetime as dt
import re

from sqlalchemy import select

from server.devices.models import ListeningSegment
from server.households import service
from server.installations import service as installations_service
from server.quota import service as quota_service
from server.staged.models import StagedEvent
from tests import factories
from tests.conftest import csrf_of


def day(n: int, hour: int = 9) -> dt.datetime:
    start = (dt.datetime.now(dt.UTC) - dt.timedelta(days=60)).replace(
        hour=0, minute=0, second=0, microsecond=0
    )
    return start + dt.timedelta(days=n, hours=hour)


def local_input(value: dt.datetime) -> str:
    return value.strftime("%Y-%m-%dT%H:%M")  # the test trial's zone is UTC


def post(c, url, token, **data):  # type: ignore[no-untyped-def]
    return c.post(url, data={"csrf_token": token, **data}, follow_redirects=False)


def test_register_list_counts_filters_and_sorts(staff_client, session, trial):
    c = staff_client("coordinator")
    a = factories.make_registered_home(session, trial, attributes={"dog": True, "dwelling_type": "flat"})
    b = factories.make_registered_home(session, trial, state="screened", attributes={"cat": True})
    page = c.get(f"/homes?trial={trial.code}")
    assert page.status_code == 200
    counts = dict(re.findall(r'data-state="(\w+)"><span class="n">(\d+)</span>', page.text))
    assert counts["candidate"] == "1" and counts["screened"] == "1" and counts["active"] == "0"
    codes = lambda text: re.findall(r'<td><a href="/homes/(H-\d+)">', text)  # noqa: E731
    assert codes(page.text) == [a.code, b.code]
    assert codes(c.get(f"/homes?trial={trial.code}&sort=code&desc=true").text) == [b.code, a.code]
    assert codes(c.get(f"/homes?trial={trial.code}&state=screened").text) == [b.code]
    assert codes(c.get(f"/homes?trial={trial.code}&attribute=dwelling_type&value=flat").text) == [a.code]
    r = c.get(f"/homes?trial={trial.code}&attribute=dog&value=perhaps")
    assert r.status_code == 200 and "is not yes or no" in r.text
    assert "dog · flat" in page.text  # the household column reads the answers


def test_new_home_form_shows_messages_beside_the_fields(staff_client, session, trial):
    c = staff_client("coordinator")
    token = csrf_of(c, f"/homes/new?trial={trial.code}")
    r = post(c, "/homes/new", token, trial=trial.code, attr_occupants="many", attr_dog="yes", email="nope")
    assert r.status_code == 422
    assert re.search(
        r'id="err-occupants">Number of occupants: &#39;many&#39; is not a whole number\.<', r.text
    )
    assert 'id="err-email"' in r.text
    assert re.search(r'<option value="yes" selected>yes</option>', r.text)  # answers are kept
    assert service.list_homes(session, trial) == []
    r = post(
        c,
        "/homes/new",
        token,
        trial=trial.code,
        attr_occupants="3",
        attr_dog="yes",
        names="Dee Sample",
        note="met at the library",
    )
    assert r.status_code == 303
    code = r.headers["location"].rsplit("/", 1)[1]
    home = service.get_home(session, code)
    assert home.attributes == {"occupants": 3, "dog": True}
    assert service.has_contact(session, home)
    page = c.get(f"/homes/{code}")
    assert "added to the register as a candidate" in page.text and "met at the library" in page.text


def test_edit_form(staff_client, session, trial):
    c = staff_client("coordinator")
    home = factories.make_registered_home(session, trial, attributes={"dog": True})
    token = csrf_of(c, f"/homes/{home.code}/edit")
    r = post(c, f"/homes/{home.code}/edit", token, attr_dog="no", attr_dwelling_type="palace")
    assert r.status_code == 422 and 'id="err-dwelling_type"' in r.text
    assert post(c, f"/homes/{home.code}/edit", token, attr_dog="no", attr_cat="yes").status_code == 303
    assert service.get_home(session, home.code).attributes == {"dog": False, "cat": True}


def test_home_page_walk_through_forms(staff_client, session, settings, store, trial):
    c = staff_client("coordinator")
    device, _ = factories.make_device(session, trial)
    quota_service.add_target(session, trial, attribute_key="dog", value=True, min_count=1)
    home = factories.make_registered_home(
        session, trial, state="screened", attributes={"dog": True}, at=day(0)
    )
    token = csrf_of(c, f"/homes/{home.code}")
    # Consent, with the move to consented.
    r = post(
        c,
        f"/homes/{home.code}/consent",
        token,
        form_version="",
        consented_on=day(1).date().isoformat(),
        retention_days="60",
        staff_may_listen="yes",
        mark_consented="yes",
    )
    assert r.status_code == 422 and 'id="err-form_version"' in r.text
    r = post(
        c,
        f"/homes/{home.code}/consent",
        token,
        form_version="v2",
        consented_on=day(1).date().isoformat(),
        retention_days="60",
        staff_may_listen="yes",
        mark_consented="yes",
    )
    assert r.status_code == 303 and service.get_home(session, home.code).state == "consented"
    # Install through the form; then an overlapping install of the same device elsewhere is refused.
    r = post(
        c,
        f"/homes/{home.code}/installations/new",
        token,
        device=device.serial,
        room="living_room",
        installed_at=local_input(day(2)),
    )
    assert r.status_code == 303, r.text
    other = factories.make_registered_home(session, trial, state="consented", at=day(0))
    r = post(
        c,
        f"/homes/{other.code}/installations/new",
        token,
        device=device.serial,
        room="kitchen",
        installed_at=local_input(day(3)),
    )
    assert r.status_code == 409 and 'id="err-device"' in r.text and "remove it there first" in r.text
    # Make it active, add listening and an alert, log a staged test.
    r = post(c, f"/homes/{home.code}/state", token, to_state="active", at=local_input(day(2, 10)))
    assert r.status_code == 303
    session.add(
        ListeningSegment(device_id=device.id, started_at=day(2, 10), ended_at=day(2, 22), is_open=False)
    )
    device.last_seen_at = day(2, 22)
    factories.make_alert(session, store, settings, device, detected_at=day(2, 12), sound_class="glass_break")
    session.flush()
    r = post(
        c,
        f"/homes/{home.code}/staged-events",
        token,
        sound_class="smoke_alarm",
        started_at=local_input(day(2, 15)),
        ended_at=local_input(day(2, 14)),
        source="",
    )
    assert r.status_code == 422 and 'id="err-ended_at"' in r.text and 'id="err-source"' in r.text
    r = post(
        c,
        f"/homes/{home.code}/staged-events",
        token,
        sound_class="smoke_alarm",
        started_at=local_input(day(2, 15)),
        ended_at=local_input(day(2, 16)),
        source="test alarm in the living room, 2 m away",
        level_db="82",
    )
    assert r.status_code == 303
    ev = session.scalar(select(StagedEvent).where(StagedEvent.home_id == home.id))
    assert ev is not None and ev.started_at == day(2, 15) and ev.level_db == 82.0
    page = c.get(f"/homes/{home.code}").text
    inst = re.search(r'id="installations">(.*?)</table>', page, re.S)
    assert (
        inst
        and device.serial in inst.group(1)
        and "living room" in inst.group(1)
        and "in place" in inst.group(1)
    )
    alerts = re.search(r'id="alerts">(.*?)</table>', page, re.S)
    assert alerts and re.search(r"glass break</td><td class=\"num\">1</td>", alerts.group(1))
    listening = re.search(r'id="listening">(.*?)</div>\s*<div class="panel" id="alerts"', page, re.S)
    assert listening and "12.0 h" in listening.group(1)
    timeline = re.findall(r"<li><strong>(\w+)</strong>", page)
    assert timeline == ["candidate", "screened", "consented", "installed", "active"]
    assert "test alarm in the living room" in page and "v2" in page
    # Pausing drops the only dog home below the target: the warning shows after the redirect.
    r = post(c, f"/homes/{home.code}/state", token, to_state="paused", listening="no")
    assert r.status_code == 303
    page = c.get(f"/homes/{home.code}").text
    assert re.search(r'class="flash warn"[^>]*>Quota target &#39;Dog: yes&#39; now has 0 homes', page)
    assert "devices stopped listening" in page
    # An illegal step from the form comes back with its sentence beside the field.
    r = post(c, f"/homes/{home.code}/state", token, to_state="candidate")
    assert r.status_code == 409 and "cannot go from paused to candidate" in r.text


def test_installation_page_corrects_and_removes(staff_client, session, settings, store, trial):
    c = staff_client("coordinator")
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(5))
    alert = factories.make_alert(session, store, settings, device, detected_at=day(4))
    assert alert.home_id is None
    inst = installations_service.list_installations(session, home=home)[0]
    url = f"/homes/{home.code}/installations/{inst.id}"
    token = csrf_of(c, url)
    r = post(
        c,
        url + "/correct",
        token,
        installed_at=local_input(day(5)),
        removed_at=local_input(day(4)),
        room="kitchen",
    )
    assert r.status_code == 422 and 'id="err-fix_removed_at"' in r.text
    r = post(c, url + "/correct", token, installed_at=local_input(day(3)), removed_at="", room="bedroom")
    assert r.status_code == 303
    session.refresh(alert)
    assert alert.home_id == home.id
    assert "1 alert(s) re-attributed" in c.get(f"/homes/{home.code}").text
    r = post(c, url + "/remove", token, removed_at=local_input(day(9)))
    assert r.status_code == 303
    session.refresh(inst)
    assert inst.removed_at == day(9) and inst.room == "bedroom"


def test_attribute_catalogue_page(staff_client, session, trial):
    c = staff_client("coordinator")
    token = csrf_of(c, f"/homes/attributes?trial={trial.code}")
    r = post(
        c, "/homes/attributes", token, trial=trial.code, key="Bad Key", label="", kind="one_of", options="a"
    )
    assert r.status_code == 422
    for field in ("key", "label", "options"):
        assert f'id="err-{field}"' in r.text
    r = post(
        c,
        "/homes/attributes",
        token,
        trial=trial.code,
        key="fireplace",
        label="Open fireplace",
        kind="yes_no",
    )
    assert r.status_code == 303
    assert "fireplace" in [d.key for d in service.catalogue.list_catalogue(session, trial)]
    new_form = c.get(f"/homes/new?trial={trial.code}").text
    assert 'name="attr_fireplace"' in new_form


def test_page_forms_need_the_csrf_token(staff_client, session, trial):
    c = staff_client("coordinator")
    home = factories.make_registered_home(session, trial)
    r = c.post(f"/homes/{home.code}/state", data={"to_state": "screened"}, follow_redirects=False)
    assert r.status_code == 403 and "security token" in r.text
    assert service.get_home(session, home.code).state == "candidate"


def test_default_catalogue_seeded_for_every_trial(session):
    t = factories.make_trial(session)
    keys = [d.key for d in service.catalogue.list_catalogue(session, t)]
    assert keys[:3] == ["infant_under_2", "children_2_to_12", "dog"] and len(keys) == 12
    occupants = next(d for d in service.catalogue.list_catalogue(session, t) if d.key == "occupants")
    assert (occupants.kind, occupants.min_value, occupants.max_value) == ("whole_number", 1, 30)


def test_every_form_carries_the_session_token(staff_client, session, trial):
    c = staff_client("coordinator")
    device, _ = factories.make_device(session, trial)
    home = factories.make_installed_home(session, trial, device, installed_at=day(1))
    inst = installations_service.list_installations(session, home=home)[0]
    token = csrf_of(c)
    for url in (
        f"/homes?trial={trial.code}",
        f"/homes/new?trial={trial.code}",
        f"/homes/{home.code}",
        f"/homes/{home.code}/edit",
        f"/homes/{home.code}/contact",
        f"/homes/{home.code}/erase",
        f"/homes/{home.code}/installations/new",
        f"/homes/{home.code}/installations/{inst.id}",
        f"/homes/import?trial={trial.code}",
        f"/homes/attributes?trial={trial.code}",
        f"/quota?trial={trial.code}",
    ):
        text = c.get(url).text
        forms = re.findall(r'<form method="post".*?</form>', text, re.S)
        assert forms, url
        for form in forms:
            assert f'name="csrf_token" value="{token}"' in form, (url, form[:120])
