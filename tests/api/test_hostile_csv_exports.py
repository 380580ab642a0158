"""Every CSV the server hands out escapes spreadsheet formulas, whatever devices and staff wrote.

A pilot whose device-supplied strings (firmware, hardware model, event ids) and staff-defined values
(rooms, attribute options, cause codes and labels, contact details, staged-event sources, audit
details) start with = + - @ tab or carriage return is exported through every route that answers
text/csv, each as a role allowed to download it, and through the register export the CLI uses. No
parsed cell may start with one of those characters unless it is a plain number. The routes are found
by walking the app, so a new CSV route that this test does not download fails it. Both backends.
(The escaping function itself is unit-tested in test_hostile_csv.py.)
"""

from __future__ import annotations

import csv
import datetime as dt
import inspect
import io
import re
from typing import Any

import pytest
from fastapi import FastAPI
from sqlalchemy import insert, select, update
from sqlalchemy.orm import Session

from server import audit
from server.devices.models import Alert, Device, FirmwareChange, ListeningSegment
from server.households import catalogue, transfer
from server.households import service as households_service
from server.households.models import HomeContact
from server.models import metadata
from server.roles import CAPABILITIES
from server.web.csvsafe import FORMULA_STARTS
from tests import factories
from tests.api.test_staff_access import all_routes

# By table, not model: installations and staged events are moving to packages of their own.
INSTALLATION = metadata.tables["installation"]
STAGED_EVENT = metadata.tables["staged_event"]

UTC = dt.UTC
TRIAL_START = dt.date(2026, 9, 7)
WEEK = "2026-W40"
W0 = dt.datetime(2026, 9, 28, tzinfo=UTC)  # Monday of the reported week
W1 = W0 + dt.timedelta(days=7)
NOW = W1 + dt.timedelta(days=2, hours=9)

# Each starts with one of the characters a spreadsheet reads as a formula. SHORT goes into columns of
# 16-20 characters (rooms, phone numbers).
HOSTILE = ['=HYPERLINK("http://x.invalid","y")', "+SUM(1,2)", "-2+3*cmd", "@SUM(A1:A2)", "\tHIDDEN=1"]
SHORT = ["=1+2", "+A1", "-1+1", "@A1", "\tlanding"]
# A carriage return: escaped with the apostrophe, and the cell must also be quoted, or a reader
# starts a new row at the CR and the text after it opens a row of its own, unescaped (pandas'
# to_csv with its default bare "\n" line end left such cells unquoted; the exports write CRLF).
CR_HOSTILE = ["\r=1+1", "\r+SUM(3,4)", "\r@SUM(B1)", "\r-4+5", "\r=HYPERLINK(1)"]
CR_SHORT = ["\r=2", "\r+A1", "\r@A1", "\r-1+1", "\r=3"]

# The CSV routes this test downloads. A route answering text/csv that is not here fails the test.
COVERED = {
    "/api/v1/homes/export.csv",
    "/api/v1/homes/export-personal.csv",
    "/homes/export.csv",
    "/homes/export-personal.csv",
    "/api/v1/trials/{code}/summary/tables/{name}.csv",
    "/admin/audit.csv",
}
ROLE_ORDER = ("lead", "coordinator", "reviewer", "admin")  # the least-privileged role allowed downloads


def plain_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return cell.strip() == cell


def formula_cells(text: str) -> list[str]:
    """Cells of ``text`` (parsed as CSV) that a spreadsheet would evaluate."""
    return [
        cell
        for row in csv.reader(io.StringIO(text, newline=""))
        for cell in row
        if cell.startswith(FORMULA_STARTS) and not plain_number(cell)
    ]


def escaped_cells(text: str, values: list[str]) -> set[str]:
    """Cells that are one of ``values`` with the escaping apostrophe in front."""
    wanted = {"'" + h for h in values}
    return {cell for row in csv.reader(io.StringIO(text, newline="")) for cell in row if cell in wanted}


def test_formula_check_of_this_test_catches_an_unescaped_cell() -> None:
    assert formula_cells('a,b\r\n"=HYPERLINK(""x"")",-1.5\r\n') == ['=HYPERLINK("x")']
    assert formula_cells('a\r\n"\tx"\r\n\'=1\r\n-2\r\n+3\r\n') == ["\tx"]
    assert escaped_cells("'=1+2,x\r\n", SHORT) == {"'=1+2"}
    assert formula_cells("a\n'\r=1+1\n") == ["=1+1"]  # the row a bare CR starts


@pytest.fixture
def pilot(request, session: Session, store, settings, app: FastAPI) -> dict[str, Any]:  # type: ignore[no-untyped-def]
    """A pilot whose every free-text string starts like a formula; the reported week is WEEK."""
    HOSTILE, SHORT = request.param  # noqa: N806 (the values of this run)
    app.state.clock = lambda: NOW
    trial = factories.make_trial(
        session, code="FORMULA-1", name="Formula pilot", starts_on=TRIAL_START, timezone="UTC"
    )
    cause_codes = [h[:40] for h in HOSTILE]
    trial.causes = [
        *trial.causes,
        *({"code": c, "label": h} for c, h in zip(cause_codes, HOSTILE, strict=True)),
    ]
    catalogue.add_attribute(
        session,
        trial,
        key="tone",
        label="Tone",
        kind="one_of",
        options=["plain", *[h.strip() for h in HOSTILE]],
    )
    session.flush()
    start = dt.datetime.combine(TRIAL_START, dt.time(9), UTC)
    homes = []
    for i, (h, short) in enumerate(zip(HOSTILE, SHORT, strict=True)):
        device, _ = factories.make_device(session, trial)
        home = factories.make_installed_home(session, trial, device, installed_at=start)
        homes.append(home)
        # Values as stored, whatever the forms would allow today: exports must not trust validation.
        home.attributes = {**(home.attributes or {}), "tone": h}
        session.execute(update(INSTALLATION).where(INSTALLATION.c.device_id == device.id).values(room=short))
        session.execute(update(Device).where(Device.id == device.id).values(hardware_model=h, firmware=h))
        session.add(FirmwareChange(device_id=device.id, at=W0 - dt.timedelta(days=14), firmware=h))
        session.add(
            ListeningSegment(
                device_id=device.id, started_at=W0 - dt.timedelta(days=14), ended_at=W1, is_open=False
            )
        )
        session.add(HomeContact(home_id=home.id, names=h, address=h, phone=short, email=h, access_notes=h))
        session.flush()
        session.execute(
            insert(STAGED_EVENT).values(
                trial_id=trial.id,
                home_id=home.id,
                sound_class="smoke_alarm",
                started_at=W0 + dt.timedelta(days=2, hours=i),
                ended_at=W0 + dt.timedelta(days=2, hours=i, minutes=1),
                source=h,
                created_at=NOW,
            )
        )
        for k, label in enumerate(("false_alarm", "false_alarm", "confirmed")):
            when = W0 + dt.timedelta(days=1 + k, hours=i)
            a = factories.make_alert(
                session,
                store,
                settings,
                device,
                detected_at=when,
                score=0.9,
                now=when + dt.timedelta(minutes=1),
            )
            a.firmware, a.event_id = h, f"{h}-{k}"
            a.state, a.final_label, a.final_method = "final", label, "single"
            if label == "false_alarm":
                a.final_cause, a.final_resemblance = cause_codes[i], "unrelated"
        households_service.transition(session, home, "paused", at=W1 + dt.timedelta(hours=1), note=h)
        audit.record(session, h, "note.added", "home", short, {h: h, "note": h})
    session.flush()
    return {"trial": trial, "homes": homes, "values": HOSTILE + SHORT, "long": HOSTILE}


def world_values(pilot: dict[str, Any], session: Session) -> dict[str, str]:
    home = pilot["homes"][0]
    alert = session.scalars(select(Alert).order_by(Alert.id).limit(1)).first()  # any alert of the pilot
    assert alert is not None
    return {
        "code": pilot["trial"].code,
        "serial": "SN-none",
        "alert_id": str(alert.id),
        "user_id": "1",
        "installation_id": "1",
        "home_code": home.code,
        "kind": "spectrogram",
        "name": "overview",
    }


def csv_routes(app: FastAPI, admin, values: dict[str, str]) -> set[str]:  # type: ignore[no-untyped-def]
    """GET routes that answer text/csv to an admin, plus any whose path or code names CSV."""
    found = set()
    for method, path, route, caps in all_routes(app):
        if method != "GET" or not caps:
            continue
        source = inspect.getsource(route.endpoint) if hasattr(route, "endpoint") else ""
        if path.endswith(".csv") or "text/csv" in source or "to_csv" in source or "export_csv" in source:
            found.add(path)
            continue
        for code in (values["code"], values["home_code"]):  # {code}: a trial's or a home's
            url = re.sub(
                r"\{(\w+)(:\w+)?\}",
                lambda m, c=code: (
                    c
                    if m.group(1) == "code"  # type: ignore[misc]
                    else values.get(m.group(1), "1")
                ),
                path,
            )
            r = admin.get(url, params={"trial": values["code"], "week": WEEK}, follow_redirects=False)
            assert r.status_code < 500, (url, r.status_code)
            if r.headers.get("content-type", "").startswith("text/csv"):
                found.add(path)
    return found


def role_for(caps: list[str]) -> str:
    return next(role for role in ROLE_ORDER if role in CAPABILITIES[caps[0]])


@pytest.mark.parametrize(
    "pilot",
    [
        # One pilot holds both kinds (a home each), so the app is walked once per backend.
        pytest.param((HOSTILE + CR_HOSTILE, SHORT + CR_SHORT), id="formula-starts-and-carriage-returns"),
    ],
    indirect=True,
)
def test_every_csv_export_escapes_formula_starts(
    app: FastAPI,
    session: Session,
    staff_client,  # type: ignore[no-untyped-def]
    pilot: dict[str, Any],
) -> None:
    trial = pilot["trial"]
    clients = {role: staff_client(role, is_adjudicator=True) for role in ROLE_ORDER}
    values = world_values(pilot, session)
    if session.get_bind().dialect.name == "sqlite":  # which routes answer CSV does not depend on the backend
        found = csv_routes(app, clients["admin"], values)
        assert found - COVERED == set(), f"CSV routes this test does not download: {sorted(found - COVERED)}"
        assert COVERED - found == set(), f"listed as CSV routes but not found: {sorted(COVERED - found)}"

    caps_of = {path: caps for method, path, _, caps in all_routes(app) if method == "GET"}
    downloads: dict[str, str] = {}
    for path in sorted(COVERED):
        role = role_for(caps_of[path])
        c = clients[role]
        if "{name}" in path:
            r = c.get(f"/api/v1/trials/{trial.code}/summary/tables?week={WEEK}")
            assert r.status_code == 200, r.text
            names = r.json()["tables"]
            assert len(names) > 10, names
            for name in names:
                url = f"/api/v1/trials/{trial.code}/summary/tables/{name}.csv?week={WEEK}"
                downloads[f"{role} {url}"] = get_csv(c, url)
        else:
            url = f"{path}?trial={trial.code}"
            downloads[f"{role} {url}"] = get_csv(c, url)
    downloads["cli home export"] = transfer.export_csv(session, trial, with_personal_data=False, actor="cli")
    downloads["cli home export --with-personal-data"] = transfer.export_csv(
        session, trial, with_personal_data=True, actor="cli"
    )

    problems = {where: cells[:5] for where, text in downloads.items() if (cells := formula_cells(text))}
    assert not problems, problems
    # The hostile strings did reach the files (escaped), so the check above had something to find.
    reached = {where: escaped_cells(text, pilot["values"]) for where, text in downloads.items()}
    for part in (
        "export.csv",
        "export-personal.csv",
        "audit.csv",
        "-firmware.csv",
        "-room.csv",
        "-causes.csv",
        "cli home export --with-personal-data",
    ):
        hits = set().union(*(cells for where, cells in reached.items() if part in where))
        assert hits, f"no escaped hostile value in any download matching {part!r}"
    personal = next(
        t for w, t in downloads.items() if w.endswith("/api/v1/homes/export-personal.csv?trial=FORMULA-1")
    )
    assert {"'" + h for h in pilot["long"]} <= escaped_cells(personal, pilot["values"])
    assert client_healthy(clients["admin"])


def get_csv(client, url: str) -> str:  # type: ignore[no-untyped-def]
    r = client.get(url)
    assert r.status_code == 200, (url, r.status_code, r.text[:300])
    assert r.headers["content-type"].startswith("text/csv"), (url, r.headers["content-type"])
    return r.text


def client_healthy(client) -> bool:  # type: ignore[no-untyped-def]
    return client.get("/api/v1/health").status_code == 200
