"""A coordinator recruits a home toward a quota target in the browser and watches the bar move."""

from __future__ import annotations

import re

import pytest

from server.households import service
from server.quota import service as quota_service
from server.trials import service as trials_service
from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser


def test_coordinator_recruits_a_home_to_a_quota_target(live_server, page):
    with committed_session(live_server.settings) as s:
        trial = trials_service.list_trials(s)[0]
        user, password = factories.make_user(s, role="coordinator")
        target = quota_service.add_target(s, trial, attribute_key="dog", value="yes", min_count=2)
        factories.make_registered_home(s, trial, state="consented", attributes={"dog": True})
        tid, email = target.id, user.email
    base = live_server.url
    browser_sign_in(page, base, email, password)
    assert page.url.endswith("/homes")  # a coordinator's front page is the register

    page.goto(f"{base}/quota")
    bar = page.locator(f"#target-{tid}")
    assert bar.get_attribute("data-count") == "1" and bar.get_attribute("data-status") == "short"
    assert page.locator(f"#target-{tid} .fill").get_attribute("style") == "width:50.0%"
    assert "short by 1" in bar.inner_text()

    # Add the household: a dog owner.
    page.click("header.top nav >> text=Homes")
    page.click("text=Add a home")
    page.select_option("#attr-dog", "yes")
    page.select_option("#attr-dwelling_type", "flat")
    page.fill("#attr-occupants", "2")
    with page.expect_navigation():
        page.click("#new-home button[type=submit]")
    assert "added to the register as a candidate" in page.inner_text("main")
    code = re.search(r"/homes/(H-\d+)$", page.url).group(1)  # type: ignore[union-attr]

    # As a candidate it does not count yet, but it is the suggestion for the shortfall.
    page.goto(f"{base}/quota")
    assert page.locator(f"#target-{tid}").get_attribute("data-count") == "1"
    assert code in page.inner_text("#suggestions")

    # Screen it, then record the signed consent.
    page.goto(f"{base}/homes/{code}")
    page.select_option("#to_state", "screened")
    with page.expect_navigation():
        page.click("#state-form button[type=submit]")
    assert page.inner_text("#home-state") == "screened"
    page.fill("#form_version", "v3")
    assert page.is_checked("input[name=mark_consented]")
    with page.expect_navigation():
        page.click("#consent-form button[type=submit]")
    assert page.inner_text("#home-state") == "consented"

    # The bar has moved: the target is met.
    page.goto(f"{base}/quota")
    bar = page.locator(f"#target-{tid}")
    assert bar.get_attribute("data-count") == "2" and bar.get_attribute("data-status") == "met"
    assert page.locator(f"#target-{tid} .fill").get_attribute("style") == "width:100.0%"
    assert code in bar.inner_text()
    assert page.console_errors == []  # type: ignore[attr-defined]


def test_coordinator_erases_a_home_and_its_late_clip_is_refused(live_server, page):
    """Withdrawal with erasure in two steps from the keyboard; afterwards a clip the home's device
    buffered while offline is refused (410 home_erased) and nothing of it is stored."""
    import datetime as dt
    import json

    import httpx2

    from server.devices.clipstore import ClipStore

    now = dt.datetime.now(dt.UTC)
    with committed_session(live_server.settings) as s:
        trial = trials_service.list_trials(s)[0]
        user, password = factories.make_user(s, role="coordinator")
        device, token = factories.make_device(s, trial)
        home = factories.make_installed_home(s, trial, device, installed_at=now - dt.timedelta(days=10))
        service.set_contact(s, home, names="Ottilie Brandt", phone="0161 496 0555", email="ob@example.test")
        store = ClipStore(live_server.settings.clip_dir)
        factories.make_alert(s, store, live_server.settings, device, detected_at=now - dt.timedelta(days=2))
        code, email = home.code, user.email
    base = live_server.url
    browser_sign_in(page, base, email, password)

    page.goto(f"{base}/homes/{code}/erase")
    assert "1 audio clip file" in page.inner_text("#will-erase")
    page.fill("#confirm_code", code.lower())
    with page.expect_navigation():
        page.press("#confirm_code", "Enter")
    assert page.locator("#erase-step-2").is_visible()
    with page.expect_navigation():
        page.click("#erase-step-2 button[type=submit]")
    assert f"{code} was withdrawn and erased" in page.inner_text("main")
    assert "Ottilie" not in page.inner_text("main")
    assert list(store.iter_keys()) == []

    # The device sends what it buffered while offline, heard while it was in the home.
    meta = {
        "event_id": "buffered-7",
        "sound_class": "smoke_alarm",
        "score": 0.9,
        "detected_at": (now - dt.timedelta(days=1)).isoformat(),
        "clip_offset_s": 0.1,
        "firmware": "1.0.0",
    }
    r = httpx2.post(
        f"{base}/api/v1/alerts",
        headers={"Authorization": f"Bearer {token}"},
        files={
            "clip": ("c.wav", factories.sine_wav(seed=4711), "audio/wav"),
            "meta": (None, json.dumps(meta)),
        },
        timeout=30,
    )
    assert r.status_code == 410 and r.json()["error"]["code"] == "home_erased"
    assert list(store.iter_keys()) == [] and list(store.tmp.iterdir()) == []
    assert page.console_errors == []  # type: ignore[attr-defined]
