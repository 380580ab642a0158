"""An admin's job in the browser: add an account, change its access, issue a temporary password,
deactivate it, then find those changes in the audit trail and download them as CSV."""

from __future__ import annotations

import csv
import io
import re

import pytest

from tests import factories
from tests.conftest import browser_sign_in, committed_session

pytestmark = pytest.mark.browser


def test_admin_manages_an_account_and_reads_the_trail(live_server, page, browser) -> None:  # type: ignore[no-untyped-def]
    with committed_session(live_server.settings) as s:
        admin, password = factories.make_user(s, role="admin", email="quinn.admin@example.test")
        admin_email = admin.email
    base = live_server.url
    browser_sign_in(page, base, admin_email, password)

    # Add a reviewer who may adjudicate.
    page.click("header.top nav >> text=Staff accounts")
    assert page.url == f"{base}/admin/staff"
    page.fill("#email", "tamsin.reed@example.test")
    page.fill("#name", "Tamsin Reed")
    page.select_option("#role", "reviewer")
    page.check("#is_adjudicator")
    with page.expect_navigation():
        page.click("#add-account button[type=submit]")
    assert "Account added." in page.inner_text("#done")
    first_password = page.inner_text("#temporary-password").strip()
    assert re.fullmatch(r"[A-Za-z0-9]{5}(-[A-Za-z0-9]{5}){3}", first_password)
    assert page.inner_text("#account-role") == "reviewer" and page.inner_text("#account-adjudicator") == "yes"

    # The new person can sign in with it (in their own browser).
    other = browser.new_context()
    theirs = other.new_page()
    browser_sign_in(theirs, base, "tamsin.reed@example.test", first_password)
    assert "/login" not in theirs.url

    # Change the role to lead without the adjudicator permission: their session ends.
    page.goto(f"{base}/admin/staff")
    with page.expect_navigation():
        page.click("#accounts >> text=tamsin.reed@example.test")
    account_url = page.url
    user_id = account_url.rsplit("/", 1)[1]
    page.select_option("#access-form #role", "lead")
    page.uncheck("#access-form #is_adjudicator")
    with page.expect_navigation():
        page.click("#access-form button[type=submit]")
    assert "Access changed" in page.inner_text("#done")
    assert page.inner_text("#account-role") == "lead" and page.inner_text("#account-adjudicator") == "no"
    theirs.goto(f"{base}/account")
    assert "/login" in theirs.url

    # Issue a temporary password: a new one, shown once.
    with page.expect_navigation():
        page.click("#reset-form button[type=submit]")
    second_password = page.inner_text("#temporary-password").strip()
    assert second_password != first_password
    page.goto(account_url)
    assert page.locator("#temporary-password").count() == 0

    # Deactivate: the account can no longer sign in, even with the new password.
    with page.expect_navigation():
        page.click("#deactivate-form button[type=submit]")
    assert page.inner_text("#account-state") == "deactivated"
    assert page.locator("#reactivate-form").count() == 1
    theirs.goto(f"{base}/login")
    theirs.fill("#email", "tamsin.reed@example.test")
    theirs.fill("#password", second_password)
    with theirs.expect_navigation():
        theirs.click("button[type=submit]")
    assert "/login" in theirs.url
    other.close()

    # The audit trail, filtered to this account, shows the admin's four changes, newest first.
    page.click("header.top nav >> text=Audit trail")
    page.select_option("#f-object_type", "user")
    page.fill("#f-object_id", user_id)
    page.fill("#f-actor", "quinn.admin")
    with page.expect_navigation():
        page.click("#trail-filter button[type=submit]")
    shown = page.locator("#trail tbody tr").evaluate_all("rows => rows.map(r => r.dataset.action)")
    assert shown == ["user.deactivate", "user.password_set", "user.access_change", "user.create"]
    assert "4" == page.inner_text("#trail-count strong")

    with page.expect_download() as dl:
        page.click("#trail-csv")
    text = open(dl.value.path(), encoding="utf-8").read()  # noqa: SIM115
    rows = list(csv.reader(io.StringIO(text)))
    assert rows[0] == ["id", "at_utc", "actor", "action", "object_type", "object_id", "detail"]
    assert [r[3] for r in rows[1:]] == shown
    assert all(r[2] == "admin:quinn.admin@example.test" and r[5] == user_id for r in rows[1:])
    assert first_password not in text and second_password not in text

    # The download itself is now in the trail.
    page.goto(f"{base}/admin/audit?action=audit.export")
    assert page.inner_text("#trail-count strong") == "1"
    assert page.console_errors == []  # type: ignore[attr-defined]
