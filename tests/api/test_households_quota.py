"""The quota through the API and the page: counts, shortfalls, suggestions and withdrawal warnings."""

from __future__ import annotations

import re

from server.quota import service as quota_service
from tests import factories
from tests.conftest import csrf_of


def json_client(staff_client, role="coordinator"):  # type: ignore[no-untyped-def]
    c = staff_client(role)
    c.headers["X-CSRF-Token"] = csrf_of(c)
    return c


def add_target(c, trial, **body):  # type: ignore[no-untyped-def]
    r = c.post("/api/v1/quota/targets", json={"trial": trial.code, **body})
    assert r.status_code == 201, r.text
    return r.json()


def test_quota_counts_shortfalls_and_suggestions(staff_client, session, trial):
    c = json_client(staff_client)
    add_target(c, trial, attribute_key="dog", value="yes", min_count=2)
    add_target(c, trial, attribute_key="dwelling_type", value="flat", min_count=1, max_count=1)
    q = add_target(c, trial, min_count=3, label="Homes in total")
    assert [t["label"] for t in q["targets"]] == ["Dog: yes", "Dwelling type: flat", "Homes in total"]
    mk = factories.make_registered_home
    counted = mk(session, trial, state="consented", attributes={"dog": True, "dwelling_type": "flat"})
    mk(session, trial, state="consented", attributes={"dog": False, "dwelling_type": "detached house"})
    cand_flat_dog = mk(session, trial, attributes={"dog": True, "dwelling_type": "flat"})
    cand_dog = mk(session, trial, state="screened", attributes={"dog": True})
    mk(session, trial, state="declined", attributes={"dog": True})
    q = c.get(f"/api/v1/quota?trial={trial.code}").json()
    by = {t["label"]: t for t in q["targets"]}
    # Worked by hand: two homes count (both consented). Dog 1 of >= 2, flats 1 of 1..1, total 2 of >= 3.
    assert (by["Dog: yes"]["count"], by["Dog: yes"]["shortfall"], by["Dog: yes"]["homes"]) == (
        1,
        1,
        [counted.code],
    )
    assert (by["Dwelling type: flat"]["status"], by["Homes in total"]["shortfall"]) == ("met", 1)
    # The flat candidate would overfill the flats, so the screened dog home is the one suggestion; it
    # closes both the dog and the total shortfall.
    assert [(s["code"], s["helps"]) for s in q["suggestions"]] == [
        (cand_dog.code, ["Dog: yes", "Homes in total"])
    ]
    assert cand_flat_dog.code not in [s["code"] for s in q["suggestions"]]
    assert q["remaining_after"] == {"Dog: yes": 0, "Homes in total": 0}
    assert q["by_state"] == {"consented": 2, "candidate": 1, "screened": 1, "declined": 1}
    assert q["counted"] == 2 and q["rule"].startswith("Suggestions are picked one at a time")


def test_withdrawal_and_pause_update_the_quota_at_once(staff_client, session, trial):
    c = json_client(staff_client)
    device, _ = factories.make_device(session, trial)
    add_target(c, trial, attribute_key="infant_under_2", value="yes", min_count=1)
    import datetime as dt

    t0 = dt.datetime.now(dt.UTC).replace(microsecond=0) - dt.timedelta(days=30)
    home = factories.make_installed_home(
        session, trial, device, installed_at=t0, attributes={"infant_under_2": True}
    )
    assert c.get(f"/api/v1/quota?trial={trial.code}").json()["targets"][0]["count"] == 1
    r = c.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "paused", "listening": True})
    assert r.status_code == 200
    assert r.json()["warnings"] == [
        "Quota target 'Infant under 2: yes' now has 0 homes, below its minimum of 1."
    ]
    q = c.get(f"/api/v1/quota?trial={trial.code}").json()
    assert q["targets"][0]["count"] == 0
    assert len(q["warnings"]) == 1 and home.code in q["warnings"][0]
    # Counting paused homes too brings it back without any transition.
    r = c.put(
        "/api/v1/quota/states",
        json={"trial": trial.code, "states": ["consented", "installed", "active", "paused"]},
    )
    assert r.status_code == 200 and r.json()["targets"][0]["count"] == 1 and r.json()["warnings"] == []
    r = c.post(f"/api/v1/homes/{home.code}/transitions", json={"to_state": "withdrawn"})
    assert r.json()["warnings"] == [
        "Quota target 'Infant under 2: yes' now has 0 homes, below its minimum of 1."
    ]
    page = c.get(f"/quota?trial={trial.code}")
    assert page.status_code == 200
    warning = re.search(r'<div class="flash warn withdrawal-warning">(.*?)</div>', page.text, re.S)
    assert warning and home.code in warning.group(1) and "Infant under 2: yes" in warning.group(1)


def test_target_validation(staff_client, trial):
    c = json_client(staff_client)
    for body, field in [
        ({"attribute_key": "unicorn", "value": "yes", "min_count": 1}, "attribute_key"),
        ({"attribute_key": "dog", "value": "maybe", "min_count": 1}, "value"),
        ({"attribute_key": "dog", "value": "yes"}, "min_count"),
        ({"attribute_key": "dog", "value": "yes", "min_count": 4, "max_count": 2}, "max_count"),
    ]:
        r = c.post("/api/v1/quota/targets", json={"trial": trial.code, **body})
        assert r.status_code == 422 and field in r.json()["error"]["fields"], (body, r.text)
    r = c.put("/api/v1/quota/states", json={"trial": trial.code, "states": []})
    assert r.status_code == 422


def test_lead_sees_quota_but_cannot_change_it(staff_client, trial):
    coord = json_client(staff_client)
    lead = json_client(staff_client, "lead")
    tid = add_target(coord, trial, attribute_key="dog", value="yes", min_count=1)["targets"][0]["id"]
    assert lead.get(f"/api/v1/quota?trial={trial.code}").status_code == 200
    assert lead.post("/api/v1/quota/targets", json={"trial": trial.code, "min_count": 1}).status_code == 403
    assert lead.delete(f"/api/v1/quota/targets/{tid}?trial={trial.code}").status_code == 403
    page = lead.get(f"/quota?trial={trial.code}")
    assert page.status_code == 200 and 'id="target-form"' not in page.text
    r = coord.delete(f"/api/v1/quota/targets/{tid}?trial={trial.code}")
    assert r.status_code == 200 and r.json()["targets"] == []


def test_quota_page_shows_bars_and_page_forms_work(staff_client, session, trial):
    c = staff_client("coordinator")
    token = csrf_of(c, f"/quota?trial={trial.code}")
    r = c.post(
        "/quota/targets",
        data={
            "csrf_token": token,
            "trial": trial.code,
            "attribute_key": "cat",
            "value": "yes",
            "min_count": "2",
            "max_count": "",
            "label": "",
        },
        follow_redirects=False,
    )
    assert r.status_code == 303
    factories.make_registered_home(session, trial, state="consented", attributes={"cat": True})
    page = c.get(f"/quota?trial={trial.code}").text
    (tid,) = [t.id for t in quota_service.list_targets(session, trial)]
    block = re.search(
        rf'<div class="target" id="target-{tid}" data-count="(\d+)" data-status="(\w+)">(.*?)</form>',
        page,
        re.S,
    )
    assert block and block.group(1) == "1" and block.group(2) == "short"
    assert 'style="width:50.0%"' in block.group(3) and "short by 1" in block.group(3)
    r = c.post(
        "/quota/targets",
        data={
            "csrf_token": token,
            "trial": trial.code,
            "attribute_key": "cat",
            "value": "perhaps",
            "min_count": "x",
        },
    )
    assert r.status_code == 422 and 'id="err-min_count"' in r.text
    r = c.post("/quota/targets", data={"trial": trial.code, "attribute_key": "cat", "min_count": "1"})
    assert r.status_code == 403  # no CSRF token
