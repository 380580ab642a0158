"""The audit trail viewer on both backends: filters by actor, action, home and object, UTC date range
(both days included), pages of 50, the JSON API, and the CSV download escaped against formulas."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json

import pytest
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from server import audit
from server.admin import trail
from server.auth.models import AuditEvent
from server.web.csvsafe import safe_cell
from tests import factories
from tests.conftest import utc


@pytest.fixture
def trail_world(session: Session, trial):  # type: ignore[no-untyped-def]
    """A known trail: the table is emptied (inside the test's transaction), then filled."""
    session.execute(delete(AuditEvent))
    ana, _ = factories.make_user(session, role="coordinator", email="ana.quill@example.test")
    ben, _ = factories.make_user(session, role="admin", email="ben.orrery@example.test")
    dev, _ = factories.make_device(session, trial)
    home = factories.make_home(session, trial)
    other = factories.make_home(session, trial)
    inst = factories.make_installation(session, dev, home, installed_at=utc(2026, 11, 1))
    session.execute(delete(AuditEvent))  # drop the factories' own rows

    def add(at: dt.datetime, actor, action: str, otype: str, oid: object, detail=None) -> AuditEvent:  # type: ignore[no-untyped-def]
        ev = audit.record(session, actor, action, otype, oid, detail)
        ev.at = at
        return ev

    add(utc(2026, 11, 2, 9), ana, "personal.view", "home", home.id, {"code": home.code})
    add(
        utc(2026, 11, 2, 23, 59, 59),
        ana,
        "installation.correct",
        "installation",
        inst.id,
        {"home": home.code},
    )
    add(utc(2026, 11, 3, 0, 0, 0), ben, "personal.view", "home", other.id, {"code": other.code})
    add(utc(2026, 11, 4, 12), "cli", "device.revoke", "device", dev.id, {"serial": '=HYPERLINK("x")'})
    add(utc(2026, 11, 5, 8), ben, "home.erase", "home", home.id, {"code": home.code, "note": "+1 call"})
    for i in range(120):  # page filler, all on one day
        add(utc(2026, 10, 1, 0, i // 60, i % 60), "system", "storage.purge", "trial", trial.id, {"i": i})
    session.flush()
    return {"ana": ana, "ben": ben, "home": home, "other": other, "inst": inst, "device": dev}


def api(client, **params: str) -> dict:  # type: ignore[no-untyped-def]
    r = client.get("/api/v1/audit-events", params=params)
    assert r.status_code == 200, r.text
    return r.json()


def actions(body: dict) -> list[str]:  # type: ignore[type-arg]
    return [e["action"] for e in body["events"]]


def test_filters_by_actor_action_home_object_and_days(staff_client, trail_world) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    w = trail_world
    # By actor: e-mail fragment (any case), role prefix of the label, or a non-user actor.
    assert actions(api(admin, actor="ANA.QUILL")) == ["installation.correct", "personal.view"]
    assert actions(api(admin, actor="cli", until="2026-11-30")) == ["device.revoke"]
    assert api(admin, actor="ben.orrery@")["total"] == 2
    assert api(admin, actor="100%_")["total"] == 0  # LIKE wildcards are taken literally
    # By action.
    assert api(admin, action="personal.view")["total"] == 2
    # By home: the home's own events and those of its installations, newest first.
    body = api(admin, home=w["home"].code.lower())
    assert actions(body) == ["home.erase", "installation.correct", "personal.view"]
    assert actions(api(admin, home=w["other"].code)) == ["personal.view"]
    # By object.
    assert actions(api(admin, object_type="device", object_id=str(w["device"].id))) == ["device.revoke"]
    # Date range in UTC, both days included: 2 Nov 23:59:59 is in, 3 Nov 00:00:00 is not.
    assert actions(api(admin, since="2026-11-02", until="2026-11-02")) == [
        "installation.correct",
        "personal.view",
    ]
    assert actions(api(admin, since="2026-11-03", until="2026-11-04")) == ["device.revoke", "personal.view"]
    assert api(admin, since="2026-11-05", until="2026-11-30")["total"] == 1
    assert api(admin, until="2026-10-31")["total"] == 120
    # Filters combine.
    assert actions(api(admin, actor="ben", home=w["home"].code, since="2026-11-05", until="2026-11-05")) == [
        "home.erase"
    ]


def test_pages_of_fifty_newest_first(staff_client, trail_world) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    p1 = api(admin, action="storage.purge")
    assert (p1["total"], p1["pages"], p1["per_page"], len(p1["events"])) == (120, 3, 50, 50)
    assert [e["detail"]["i"] for e in p1["events"][:2]] == [119, 118]
    p3 = api(admin, action="storage.purge", page="3")
    assert len(p3["events"]) == 20 and p3["events"][-1]["detail"]["i"] == 0
    assert api(admin, action="storage.purge", page="4")["events"] == []
    seen = [e["id"] for p in (1, 2, 3) for e in api(admin, action="storage.purge", page=str(p))["events"]]
    assert len(set(seen)) == 120  # no row on two pages, none missed

    page = admin.get("/admin/audit", params={"action": "storage.purge", "page": "2"})
    assert page.status_code == 200
    assert "page 2 of 3" in page.text and page.text.count('data-action="storage.purge"') == 50
    assert 'href="/admin/audit?action=storage.purge&amp;page=3"' in page.text
    assert 'href="/admin/audit?action=storage.purge&amp;page=1"' in page.text


@pytest.mark.parametrize(
    "params, field",
    [
        ({"since": "2026-13-01"}, "since"),
        ({"until": "yesterday"}, "until"),
        ({"since": "2026-11-05", "until": "2026-11-01"}, "until"),
        ({"home": "H-NOPE"}, "home"),
        ({"object_id": "7"}, "object_type"),
        ({"since": "\x00\x01" * 400}, "since"),
    ],
)
def test_bad_filters_are_field_errors_not_500s(staff_client, trail_world, params, field) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    r = admin.get("/admin/audit", params=params)
    assert r.status_code == 422 and f'id="err-{field}"' in r.text
    r = admin.get("/api/v1/audit-events", params=params)
    assert r.status_code == 422
    assert r.json()["error"]["code"] == "validation_failed" and field in r.json()["error"]["fields"]
    r = admin.get("/admin/audit.csv", params=params, headers={"accept": "application/json"})
    assert r.status_code == 422
    for junk in ({"page": "-3"}, {"page": "abc"}, {"page": "9" * 40}):
        assert admin.get("/admin/audit", params=junk).status_code == 200
    assert admin.get("/api/v1/audit-events", params={"per_page": "0"}).status_code == 422
    assert admin.get("/api/v1/health").status_code == 200


def test_csv_download_escapes_formulas_and_is_itself_audited(
    staff_client, trail_world, session: Session
) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    w = trail_world
    # An actor label a spreadsheet would evaluate.
    ev = audit.record(session, "@SUM(A1:A9)", "device.revoke", "device", "-5", {})
    ev.at = utc(2026, 11, 4, 13)
    session.flush()
    r = admin.get("/admin/audit.csv", params={"since": "2026-11-02", "until": "2026-11-05"})
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/csv")
    assert 'filename="audit-trail.csv"' in r.headers["content-disposition"]
    rows = list(csv.reader(io.StringIO(r.text)))
    assert rows[0] == list(trail.CSV_COLUMNS)
    body = rows[1:]
    assert [row[3] for row in body] == [
        "home.erase",
        "device.revoke",
        "device.revoke",
        "personal.view",
        "installation.correct",
        "personal.view",
    ]
    erase = body[0]
    assert erase[1] == "2026-11-05T08:00:00+00:00" and erase[2] == "admin:ben.orrery@example.test"
    assert erase[4:6] == ["home", str(w["home"].id)]
    assert json.loads(erase[6]) == {"code": w["home"].code, "note": "+1 call"}  # JSON text starts with {
    assert body[1][2] == "'@SUM(A1:A9)" and body[1][5] == "'-5"
    assert body[2][2] == "cli"
    assert not any(cell.startswith(("=", "+", "-", "@", "\t", "\r")) for row in body for cell in row)
    # The download is recorded (after reading, so it is not in its own file).
    [rec] = session.scalars(select(AuditEvent).where(AuditEvent.action == "audit.export")).all()
    assert rec.actor_id == admin.user.id
    assert rec.detail == {"filter": {"since": "2026-11-02", "until": "2026-11-05"}, "rows": 6}


def test_viewer_page_links_the_csv_with_the_same_filter(staff_client, trail_world) -> None:  # type: ignore[no-untyped-def]
    admin = staff_client("admin")
    code = trail_world["home"].code
    r = admin.get("/admin/audit", params={"home": code, "actor": "ana"})
    assert r.status_code == 200
    assert f'href="/admin/audit.csv?actor=ana&amp;home={code}"' in r.text
    assert "<strong>2</strong> entries" in r.text
    assert "Staff accounts" in r.text and "Audit trail" in r.text  # admin nav links


@pytest.mark.parametrize(
    "value, expected",
    [
        ("=1+1", "'=1+1"),
        ("+1", "'+1"),
        ("-1", "'-1"),
        ("@x", "'@x"),
        ("\tx", "'\tx"),
        ("\rx", "'\rx"),
        ("plain", "plain"),
        ("", ""),
        ("a=b", "a=b"),
        (42, 42),
        (None, None),
    ],
)
def test_safe_cell_prefixes_formula_starts_only(value, expected) -> None:  # type: ignore[no-untyped-def]
    # OWASP CSV injection guidance (from memory): = + - @ tab and CR start a formula.
    assert safe_cell(value) == expected


def test_audit_trail_mentions_link_to_the_trail_for_admins_only(
    staff_client, session: Session, trial
) -> None:  # type: ignore[no-untyped-def]
    home = factories.make_home(session, trial)
    link = f'<a href="/admin/audit?home={home.code}" class="trail-link">recorded in the audit trail</a>'
    admin = staff_client("admin")
    r = admin.get(f"/homes/{home.code}")
    assert r.status_code == 200 and link in r.text
    coord = staff_client("coordinator")
    r = coord.get(f"/homes/{home.code}")
    assert r.status_code == 200
    assert "recorded in the audit trail" in r.text and "/admin/audit" not in r.text
