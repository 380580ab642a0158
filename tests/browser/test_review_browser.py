"""The listening desk in a real browser: keyboard-only verdicts, and no personal data for reviewers."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select

from server.devices.models import Alert
from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser


def _seed(srv, n: int = 2):
    settings = srv.settings
    store = srv.app.state.clip_store
    start = dt.datetime.now(dt.UTC) - dt.timedelta(hours=1)
    with committed_session(settings) as s:
        trial = factories.make_trial(s, timezone="Europe/Berlin")
        trial.second_review_share = 0.0
        device, _ = factories.make_device(s, trial)
        home = factories.make_home(s, trial)
        factories.make_installation(
            s, device, home, room="hallway", installed_at=start - dt.timedelta(days=2)
        )
        alerts = [
            factories.make_alert(
                s,
                store,
                settings,
                device,
                now=start + dt.timedelta(minutes=i),
                detected_at=start + dt.timedelta(minutes=i),
                clip=factories.sine_wav(seconds=3.0, freq=900.0 + 300 * i, seed=i),
                clip_offset_s=1.0,
            )
            for i in range(n)
        ]
        user, password = factories.make_user(s, role="reviewer")
        ids = [a.id for a in alerts]
        out = {"ids": ids, "email": user.email, "password": password, "home": home.code}
    return out


def test_reviewer_clears_clips_from_the_keyboard(live_server, page):
    seed = _seed(live_server)
    first, second = seed["ids"]
    base = live_server.url
    requested: list[str] = []
    page.on("request", lambda r: requested.append(r.url.removeprefix(base)))
    browser_sign_in(page, base, seed["email"], seed["password"])
    page.goto(f"{base}/review")
    with page.expect_navigation():
        page.click("#start-review")
    assert page.url.endswith(f"/review/{first}")
    assert page.text_content("[data-f=alert_id]") == f"#{first}"
    assert page.text_content("[data-f=home_code]") == seed["home"]
    # The page asks the queue for the next clip and preloads it.
    page.wait_for_function("document.querySelectorAll('#x-axis span').length > 0")

    page.keyboard.press("Space")
    page.wait_for_function(
        "!document.getElementById('player').paused && document.getElementById('player').currentTime > 0",
        timeout=10000,
    )
    page.keyboard.press("Space")
    page.wait_for_function("document.getElementById('player').paused")
    page.keyboard.press("ArrowRight")

    page.keyboard.press("f")
    page.keyboard.press("3")  # the third cause of the default list: dog
    page.keyboard.press("d")  # unrelated to the target
    assert page.is_checked("input[name=label][value=false_alarm]")
    assert page.is_checked("input[name=cause][value=dog]")
    # The next clip's audio, images and axes were fetched while this one was on screen.
    for _ in range(100):
        if f"/review/images/{second}/spectrogram.png" in requested:
            break
        page.wait_for_timeout(50)
    assert f"/clips/{second}/audio" in requested and f"/review/images/{second}/meta.json" in requested
    assert f"/review/images/{second}/spectrogram.png" in requested
    page.keyboard.press("Enter")

    page.wait_for_function(f"document.querySelector('[data-f=alert_id]').textContent === '#{second}'")
    page.wait_for_function(
        "document.getElementById('spec').complete && document.getElementById('spec').naturalWidth > 0"
    )
    assert page.url.endswith(f"/review/{second}")
    assert not page.is_checked("input[name=label][value=false_alarm]")  # a clean form for the new clip
    page.wait_for_function("document.getElementById('desk-msg').textContent.startsWith('Saved')")

    page.keyboard.press("c")
    page.keyboard.press("Enter")
    page.wait_for_selector("#desk-empty:not([hidden])")
    assert page.console_errors == []

    with committed_session(live_server.settings) as s:
        a1 = s.scalars(select(Alert).where(Alert.id == first)).one()
        a2 = s.scalars(select(Alert).where(Alert.id == second)).one()
        assert (a1.final_label, a1.final_cause, a1.final_resemblance, a1.final_method) == (
            "false_alarm",
            "dog",
            "unrelated",
            "single",
        )
        assert a2.final_label == "confirmed"


def test_reviewer_gets_403_on_personal_data_pages(live_server, page):
    seed = _seed(live_server, n=1)
    base = live_server.url
    browser_sign_in(page, base, seed["email"], seed["password"])
    for path in (f"/homes/{seed['home']}/contact", "/homes/export-personal.csv"):
        response = page.goto(f"{base}{path}")
        assert response is not None and response.status == 403, path
    # And the desk itself shows the home code and room, nothing from the contact record.
    page.goto(f"{base}/review")
    with page.expect_navigation():
        page.click("#start-review")
    facts = page.text_content("#facts")
    assert seed["home"] in facts and "hallway" in facts
    assert "@" not in facts
