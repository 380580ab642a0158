"""A coordinator recruits a home toward a quota target in the browser and watches the bar move."""

from __future__ import annotations

import re

import pytest

from server.households import service
from server.trials import service as trials_service
from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser


def test_coordinator_recruits_a_home_to_a_quota_target(live_server, page):
    with committed_session(live_server.settings) as s:
        trial = trials_service.list_trials(s)[0]
        user, password = factories.make_user(s, role="coordinator")
        target = service.add_target(s, trial, attribute_key="dog", value="yes", min_count=2)
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
