"""Signing in and out in the browser: the old cookie is dead after sign-out; the account page
creates, lists and revokes a personal API token (keyboard only for the revoke)."""

from __future__ import annotations

import httpx2
import pytest

from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser

COOKIE = "trialhouse_session"


def test_sign_out_kills_the_copied_cookie(live_server, page, browser):  # type: ignore[no-untyped-def]
    with committed_session(live_server.settings) as s:
        user, password = factories.make_user(s, role="lead")
        email = user.email
    base = live_server.url
    browser_sign_in(page, base, email, password)
    assert page.url.endswith("/summary")
    saved = [c for c in page.context.cookies() if c["name"] == COOKIE]
    assert len(saved) == 1 and saved[0]["httpOnly"]

    # A second browser holding a copy of the cookie is signed in too...
    other = browser.new_context()
    try:
        other.add_cookies(saved)
        thief = other.new_page()
        thief.goto(f"{base}/account")
        assert thief.url.endswith("/account") and email in thief.inner_text("main")

        with page.expect_navigation():
            page.click("header.top button:has-text('Sign out')")
        assert "/login" in page.url
        assert not [c for c in page.context.cookies() if c["name"] == COOKIE]

        # ...until the owner signs out: then the copy is worth nothing, in a browser or a script.
        thief.goto(f"{base}/account")
        assert "/login" in thief.url and email not in thief.inner_text("main")
        r = httpx2.get(f"{base}/api/v1/account/tokens", cookies={COOKIE: saved[0]["value"]})
        assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"
    finally:
        other.close()
    assert not page.console_errors


def test_account_page_creates_lists_and_revokes_a_token(live_server, page):  # type: ignore[no-untyped-def]
    with committed_session(live_server.settings) as s:
        user, password = factories.make_user(s, role="reviewer")
        email = user.email
    base = live_server.url
    browser_sign_in(page, base, email, password)
    page.goto(f"{base}/account")
    page.fill("#token-label", "weekly pull")
    page.select_option("#token-days", "30")
    with page.expect_navigation():
        page.click("#new-token-form button[type=submit]")
    token = page.inner_text("#new-token").strip()
    assert token.startswith("ths_")
    row = page.locator("#token-list tr", has_text="weekly pull")
    assert "live" in row.inner_text() and "never" in row.inner_text()

    r = httpx2.get(f"{base}/api/v1/account/tokens", headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 200 and r.json()["tokens"][0]["label"] == "weekly pull"
    page.goto(f"{base}/account")
    assert token not in page.content()  # shown once
    row = page.locator("#token-list tr", has_text="weekly pull")
    assert "never" not in row.inner_text()  # last use is listed now

    # Revoke from the keyboard: focus the row's button and press Enter.
    row.locator("button:has-text('Revoke')").focus()
    with page.expect_navigation():
        page.keyboard.press("Enter")
    assert "Token revoked" in page.inner_text("main")
    assert "revoked" in page.locator("#token-list tr", has_text="weekly pull").inner_text()
    r = httpx2.get(f"{base}/api/v1/account/tokens", headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 401 and r.json()["error"]["code"] == "invalid_token"
    assert not page.console_errors
