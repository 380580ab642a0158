"""An admin limits a staff account to some trials from its account page or the CLI; the limit
holds on the person's next page, and is recorded in the audit trail. Both backends."""

from __future__ import annotations

import re

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.auth.models import AuditEvent
from server.trials import service as trials_service
from tests import factories
from tests.api.test_trial_membership import app  # noqa: F401  (a fresh Session per request)
from tests.conftest import csrf_of


def test_admin_ticks_trials_and_the_limited_coordinator_loses_the_other_trial(staff_client, session: Session):  # type: ignore[no-untyped-def]
    a = factories.make_trial(session, code="ASH-PILOT", name="Ash pilot")
    b = factories.make_trial(session, code="ELM-PILOT", name="Elm pilot")
    factories.make_home(session, a, code="H-31001")
    factories.make_home(session, b, code="H-31002")
    admin = staff_client("admin")
    coord = staff_client("coordinator")
    cid = coord.user.id
    before = coord.get("/homes?trial=ELM-PILOT")
    assert before.status_code == 200 and "H-31002" in before.text

    page = admin.get(f"/admin/staff/{cid}")
    assert page.status_code == 200
    assert 'id="trial-ASH-PILOT"' in page.text and 'id="trial-ELM-PILOT"' in page.text
    assert not re.search(r'id="trial-ASH-PILOT"[^>]*checked', page.text)
    token = csrf_of(admin, f"/admin/staff/{cid}")
    r = admin.post(
        f"/admin/staff/{cid}/trials",
        data={"csrf_token": token, "trial": ["ASH-PILOT"]},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"].endswith("done=trials")
    page = admin.get(f"/admin/staff/{cid}")
    assert re.search(r'id="trial-ASH-PILOT"[^>]*checked', page.text)
    assert not re.search(r'id="trial-ELM-PILOT"[^>]*checked', page.text)

    # The coordinator's open session sees the limit on the next page: Elm is gone, Ash stays.
    r = coord.get("/homes?trial=ELM-PILOT")
    assert "H-31002" not in r.text
    assert "H-31001" in coord.get("/homes?trial=ASH-PILOT").text
    events = list(session.scalars(select(AuditEvent).where(AuditEvent.action == "user.trials")))
    assert [e.detail["after"] for e in events] == [["ASH-PILOT"]]

    # Nothing ticked: every trial again. An unknown code is refused on the page, nothing changes.
    r = admin.post(f"/admin/staff/{cid}/trials", data={"csrf_token": token, "trial": ["NO-SUCH"]})
    assert r.status_code == 404 and 'id="problem"' in r.text
    assert trials_service.visible_trial_ids(session, coord.user) == {a.id}
    admin.post(f"/admin/staff/{cid}/trials", data={"csrf_token": token}, follow_redirects=False)
    assert trials_service.visible_trial_ids(session, coord.user) is None
    assert "H-31002" in coord.get("/homes?trial=ELM-PILOT").text


def test_trials_form_is_admin_only(staff_client, session: Session):  # type: ignore[no-untyped-def]
    factories.make_trial(session, code="OAK-PILOT")
    lead = staff_client("lead")
    token = csrf_of(lead, "/account")
    r = lead.post(f"/admin/staff/{lead.user.id}/trials", data={"csrf_token": token, "trial": []})
    assert r.status_code == 403
    assert trials_service.visible_trial_ids(session, lead.user) is None


def test_cli_limits_and_frees_an_account(tmp_path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    from tests.api.test_admin_cli import run, trail

    d = tmp_path / "var"
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(d))
    monkeypatch.delenv("TRIALHOUSE_DATABASE_URL", raising=False)
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "admin-trials-test-secret-" + "q" * 32)
    for code_ in ("BIRCH-1", "CEDAR-2"):
        assert (
            run(
                capsys,
                monkeypatch,
                "trial",
                "add",
                "--code",
                code_,
                "--name",
                code_,
                "--sound-classes",
                "smoke_alarm",
            )[0]
            == 0
        )
    assert (
        run(
            capsys,
            monkeypatch,
            "user",
            "add",
            "--email",
            "pia@example.test",
            "--role",
            "coordinator",
            stdin="amber kettle lantern 42\n",
        )[0]
        == 0
    )
    code, out, _ = run(
        capsys, monkeypatch, "user", "trials", "--email", "pia@example.test", "--trials", "cedar-2"
    )
    assert code == 0 and out.strip() == "user pia@example.test works on CEDAR-2"
    code, out, _ = run(capsys, monkeypatch, "user", "trials", "--email", "pia@example.test", "--trials", "")
    assert code == 0 and out.strip() == "user pia@example.test sees every trial"
    code, _, err = run(
        capsys, monkeypatch, "user", "trials", "--email", "pia@example.test", "--trials", "NOPE"
    )
    assert code != 0 and "NOPE" in err
    assert [a for _, a in trail(d, "pia@example.test")].count("user.trials") == 2
