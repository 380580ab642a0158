"""CSV import (all rows or none, with a report per bad row) and export with or without personal data."""

from __future__ import annotations

import io
import re

import pandas as pd
from sqlalchemy import func, select

from server.auth.models import AuditEvent
from server.households import service
from server.households.models import Home, HomeContact
from tests.conftest import csrf_of


def json_client(staff_client, role="coordinator"):  # type: ignore[no-untyped-def]
    c = staff_client(role)
    c.headers["X-CSRF-Token"] = csrf_of(c)
    return c


def homes_in(session, trial) -> int:  # type: ignore[no-untyped-def]
    return session.scalar(select(func.count(Home.id)).where(Home.trial_id == trial.id)) or 0


GOOD = (
    "code,state,dog,dwelling_type,occupants,names,phone\n"
    "H-7001,candidate,yes,flat,2,Ada Example,+44 20 7946 0000\n"
    ",screened,no,detached house,4,,\n"
    "H-7003,,yes,,1,Bo Example,\n"
)


def test_good_file_imports_every_row(staff_client, session, trial):
    c = json_client(staff_client)
    r = c.post(
        f"/api/v1/homes/import?trial={trial.code}",
        content=GOOD.encode(),
        headers={"Content-Type": "text/csv"},
    )
    assert r.status_code == 201, r.text
    created = r.json()["created"]
    assert r.json()["rows"] == 3 and created[0] == "H-7001" and created[2] == "H-7003"
    generated = service.get_home(session, created[1])
    assert generated.state == "screened"
    assert generated.attributes == {"dog": False, "dwelling_type": "detached house", "occupants": 4}
    first = service.get_home(session, "H-7001")
    contact = session.scalar(select(HomeContact).where(HomeContact.home_id == first.id))
    assert contact is not None and contact.names == "Ada Example" and contact.phone == "+44 20 7946 0000"
    assert session.scalar(select(HomeContact).where(HomeContact.home_id == generated.id)) is None


def test_one_bad_file_imports_nothing_and_reports_each_row(staff_client, session, trial):
    c = json_client(staff_client)
    service.create_home(session, trial, code="H-7100")
    before = homes_in(session, trial)
    text = (
        "code,dog,occupants,pool,state\n"
        "H-7101,yes,2,,candidate\n"  # fine on its own
        "H-7100,yes,2,,candidate\n"  # already in the register
        "H-7102,perhaps,2,,candidate\n"  # bad yes/no
        "H-7102,no,zero,,active\n"  # duplicate in the file, bad number, state not importable
    )
    r = c.post(
        f"/api/v1/homes/import?trial={trial.code}",
        content=text.encode(),
        headers={"Content-Type": "text/csv"},
    )
    assert r.status_code == 422
    err = r.json()["error"]
    assert err["code"] == "import_rejected" and err["message"].startswith("Nothing was imported: 6 problems")
    got = [(p["row"], p["column"]) for p in err["problems"]]
    assert got == [(1, "pool"), (3, "code"), (4, "dog"), (5, "code"), (5, "state"), (5, "occupants")]
    problems = {(p["row"], p["column"]): p["problem"] for p in err["problems"]}
    assert problems[(1, "pool")].startswith("unknown attribute 'pool'")
    assert problems[(3, "code")] == "duplicate code: already in the register"
    assert problems[(5, "code")] == "duplicate code: also on line 4"
    assert problems[(4, "dog")] == "bad value: Dog: 'perhaps' is not yes or no."
    assert homes_in(session, trial) == before
    assert service.find_home(session, "H-7101") is None
    assert c.get("/api/v1/health").status_code == 200


def test_malformed_files_are_refused_whole(staff_client, session, trial):
    c = json_client(staff_client)
    before = homes_in(session, trial)
    cases = {
        b"code,dog\nH-7201,yes\nH-7202,yes,extra,fields\n": "not well-formed CSV",
        b"code,dog\nH-7203,\xff\xfe\n": "not UTF-8",
        b"": "empty",
    }
    for body, phrase in cases.items():
        r = c.post(
            f"/api/v1/homes/import?trial={trial.code}", content=body, headers={"Content-Type": "text/csv"}
        )
        assert r.status_code == 422, body
        p = r.json()["error"]["problems"]
        assert len(p) == 1 and p[0]["row"] == 0 and phrase in p[0]["problem"], p
    assert homes_in(session, trial) == before


def test_import_page_shows_the_report(staff_client, session, trial):
    c = staff_client("coordinator")
    token = csrf_of(c, f"/homes/import?trial={trial.code}")
    bad = b"code,dog\nH-7301,yes\nH-7302,sometimes\n"
    r = c.post(
        "/homes/import",
        data={"csrf_token": token, "trial": trial.code},
        files={"file": ("homes.csv", bad, "text/csv")},
    )
    assert r.status_code == 422
    assert 'id="import-rejected"' in r.text and "line 3" in r.text and "sometimes" in r.text
    assert service.find_home(session, "H-7301") is None
    r = c.post(
        "/homes/import",
        data={"csrf_token": token, "trial": trial.code},
        files={"file": ("homes.csv", b"code,dog\nH-7301,yes\n", "text/csv")},
    )
    assert r.status_code == 200 and 'id="import-done"' in r.text and "H-7301" in r.text
    assert service.get_home(session, "H-7301").attributes == {"dog": True}


def test_export_without_personal_data_by_default(staff_client, session, trial):
    c = json_client(staff_client)
    c.post(
        f"/api/v1/homes/import?trial={trial.code}",
        content=GOOD.encode(),
        headers={"Content-Type": "text/csv"},
    )
    r = c.get(f"/api/v1/homes/export.csv?trial={trial.code}")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    frame = pd.read_csv(io.StringIO(r.text), dtype=str, keep_default_na=False)
    assert len(frame) == 3 and "names" not in frame.columns and "Ada Example" not in r.text
    assert frame.set_index("code").loc["H-7001", "dog"] == "yes"
    assert session.scalar(select(AuditEvent.id).where(AuditEvent.action == "personal.export")) is None
    r = c.get(f"/api/v1/homes/export-personal.csv?trial={trial.code}")
    assert r.status_code == 200
    frame = pd.read_csv(io.StringIO(r.text), dtype=str, keep_default_na=False).set_index("code")
    assert (
        frame.loc["H-7001", "names"] == "Ada Example" and frame.loc["H-7001", "phone"] == "'+44 20 7946 0000"
    )
    ev = session.scalars(select(AuditEvent).where(AuditEvent.action == "personal.export")).all()
    assert len(ev) == 1 and ev[0].actor_id == c.user.id and ev[0].detail["homes"] == 3  # type: ignore[attr-defined]


def test_exported_formula_text_is_defused(staff_client, session, trial):
    c = json_client(staff_client)
    home = service.create_home(session, trial)
    service.set_contact(session, home, names='=HYPERLINK("x")', phone="+44 1632 960000")
    text = c.get(f"/api/v1/homes/export-personal.csv?trial={trial.code}").text
    # Phone numbers too: a spreadsheet reads "+44 ..." as a formula.
    assert re.search(r"'=HYPERLINK", text) and ",'+44 1632 960000," in text
