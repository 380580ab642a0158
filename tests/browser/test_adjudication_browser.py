"""Settling a disagreement in the browser, from the keyboard, as an adjudicator would."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select

from server.devices.models import Alert
from server.review import service as review_service
from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser


def _seed(srv):  # type: ignore[no-untyped-def]
    settings, store = srv.settings, srv.app.state.clip_store
    start = dt.datetime.now(dt.UTC) - dt.timedelta(hours=1)
    with committed_session(settings) as s:
        trial = factories.make_trial(s)
        trial.second_review_share = 1.0  # every clip gets a second, blind verdict
        device, _ = factories.make_device(s, trial)
        home = factories.make_home(s, trial)
        factories.make_installation(s, device, home, installed_at=start - dt.timedelta(days=2))
        theirs, hers = (
            factories.make_alert(
                s,
                store,
                settings,
                device,
                now=start + dt.timedelta(minutes=i),
                detected_at=start + dt.timedelta(minutes=i),
                clip=factories.sine_wav(seconds=2.0, freq=700.0 + 200 * i, seed=i),
                clip_offset_s=0.5,
            )
            for i in range(2)
        )
        first, _ = factories.make_user(s, role="reviewer")
        second, _ = factories.make_user(s, role="reviewer")
        judge, password = factories.make_user(s, role="reviewer", is_adjudicator=True)
        # Two disagreements: one between two other reviewers, one in which the adjudicator took part.
        for alert, a, b in ((theirs, first, second), (hers, judge, second)):
            review_service.record_verdict(s, reviewer=a, alert_id=alert.id, label="confirmed")
            review_service.record_verdict(
                s, reviewer=b, alert_id=alert.id, label="false_alarm", cause="dog", resemblance="unrelated"
            )
        s.flush()
        assert {a.state for a in s.scalars(select(Alert))} == {"adjudication"}
        return {"theirs": theirs.id, "hers": hers.id, "email": judge.email, "password": password}


def test_adjudicator_settles_a_disagreement_with_the_keyboard(live_server, page):  # type: ignore[no-untyped-def]
    seed = _seed(live_server)
    base = live_server.url
    browser_sign_in(page, base, seed["email"], seed["password"])
    page.goto(f"{base}/review/adjudication")
    # Her own disagreement is not offered to her; the other one is, as a link.
    assert page.locator(f"a[href='/review/adjudication/{seed['theirs']}']").count() == 1
    assert page.locator(f"a[href='/review/adjudication/{seed['hers']}']").count() == 0
    with page.expect_navigation():
        page.click(f"a[href='/review/adjudication/{seed['theirs']}']")
    assert page.url.endswith(f"/review/adjudication/{seed['theirs']}")

    page.keyboard.press("c")  # confirmed
    assert page.is_checked("input[name=label][value=confirmed]")
    with page.expect_navigation():
        page.keyboard.press("Enter")
    assert page.url.endswith("/review/adjudication")
    assert page.locator(f"a[href='/review/adjudication/{seed['theirs']}']").count() == 0
    assert page.console_errors == []
    with committed_session(live_server.settings) as s:
        alert = s.get(Alert, seed["theirs"])
        assert (alert.state, alert.final_label, alert.final_method) == ("final", "confirmed", "adjudicated")

    # Opening her own clip by address gives a page that says why, not a JSON body.
    response = page.goto(f"{base}/review/adjudication/{seed['hers']}")
    assert response is not None and response.status == 403
    assert response.headers["content-type"].startswith("text/html")
    assert "another adjudicator must settle it" in page.inner_text("main")
