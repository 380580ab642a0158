"""The Content Security Policy in a real browser: no page of any role trips it, and it stays strict.

Each staff role (and a reviewer with the adjudicator permission) signs in to a seeded demo pilot and
opens every HTML page its role may open (the GET page routes of the app, with ids from the demo),
uses the page's main control where that is cheap (filter forms; the listening desk's verdict), and
collects every ``securitypolicyviolation`` event (recorded on ``window`` by an init script, which
the policy does not govern) and console error. None may occur. Every HTML answer carries the
policy header, whose script-src allows neither 'unsafe-eval' nor 'unsafe-inline'.
"""

from __future__ import annotations

import re
from typing import Any

import pytest
from sqlalchemy import select

from server.auth.models import User
from server.demo import seed
from server.devices.models import Alert, AlertState, Device
from server.households.models import Home
from server.models import metadata
from server.roles import CAPABILITIES
from server.trials.models import Trial
from tests.api.test_staff_access import all_routes
from tests.browser import test_demo_browser
from tests.conftest import LiveServer, browser_sign_in, committed_session, wait_until

pytestmark = pytest.mark.browser

RECORDER = """
window.__csp = [];
document.addEventListener('securitypolicyviolation', function (e) {
  window.__csp.push([e.violatedDirective, e.blockedURI, e.sourceFile + ':' + e.lineNumber,
                     e.sample].join(' | '));
});
"""
# Sign-ins: (label, demo role, adjudicator flag) -> the capabilities come from the role.
SIGN_INS = [
    ("admin", "admin", None),
    ("coordinator", "coordinator", None),
    ("reviewer", "reviewer", False),
    ("adjudicator", "reviewer", True),
    ("lead", "lead", None),
]
NOT_PAGES = (".csv", ".png", ".json", "/audio")

# The seeded demo pilot and its live server (module-scoped fixtures shared with the demo journeys).
demo, server = test_demo_browser.demo, test_demo_browser.server


@pytest.fixture
def csp_page(page):  # type: ignore[no-untyped-def]
    """The shared page fixture (console errors collected), recording policy violations on ``window``."""
    page.context.add_init_script(RECORDER)
    return page


def sample_ids(demo: seed.SeedResult) -> dict[str, str]:
    """Ids for the path parameters: a live alert with its clip, a home with an installation, a user."""
    with committed_session(demo.settings) as s:
        alert = s.scalars(select(Alert).where(Alert.state == AlertState.pending).order_by(Alert.id)).first()
        disputed = s.scalars(
            select(Alert).where(Alert.state == AlertState.adjudication).order_by(Alert.id)
        ).first()
        assert disputed is not None, "the demo leaves disagreements for the adjudicator"
        installation = metadata.tables["installation"]  # by table: the model is moving packages
        inst = s.execute(select(installation).order_by(installation.c.id).limit(1)).first()
        assert alert is not None and inst is not None
        home = s.get(Home, inst.home_id)
        device = s.get(Device, inst.device_id)
        trial = s.scalars(select(Trial)).first()
        user = s.scalars(select(User).where(User.role == "lead")).first()
        assert home is not None and device is not None and trial is not None and user is not None
        return {
            "alert_id": str(alert.id),
            "disputed_id": str(disputed.id),
            "code": home.code,
            "installation_id": str(inst.id),
            "serial": device.serial,
            "user_id": str(user.id),
            "trial": trial.code,
        }


def page_routes(app: Any, role: str) -> list[str]:
    """The GET page routes (not /api/, not files) whose capability the role holds."""
    out = []
    for method, path, _route, caps in all_routes(app):
        if method != "GET" or len(caps) != 1 or path.startswith("/api/") or path.endswith(NOT_PAGES):
            continue
        if role in CAPABILITIES[caps[0]]:
            out.append(path)
    return sorted(out)


def fill(path: str, ids: dict[str, str]) -> str:
    if path.startswith("/review/adjudication/"):  # the adjudication page opens on a disputed clip
        ids = {**ids, "alert_id": ids["disputed_id"]}
    return re.sub(r"\{(\w+)(:\w+)?\}", lambda m: ids[m.group(1)], path)


def assert_strict_policy(response: Any, where: str) -> None:
    policy = response.headers.get("content-security-policy")
    assert policy, f"{where}: no Content-Security-Policy header"
    directives = {d.strip().split(" ")[0]: d.strip() for d in policy.split(";") if d.strip()}
    script = directives.get("script-src") or directives.get("default-src")
    assert script, f"{where}: no script-src or default-src"
    assert "'unsafe-eval'" not in script and "'unsafe-inline'" not in script, (where, script)
    assert "'unsafe-eval'" not in policy, (where, policy)


def drain(page: Any, where: str, found: list[str]) -> None:
    """Move this page's violations and console errors into ``found`` (before it is left)."""
    for v in page.evaluate("() => window.__csp || []"):
        found.append(f"{where}: CSP {v}")
    for e in page.console_errors:
        found.append(f"{where}: console {e}")
    page.console_errors.clear()


def use_main_control(page: Any, path: str, base: str) -> str | None:
    """Work the page's main control where cheap; returns a label of what was done, or None."""
    if path == "/review" and page.locator("#start-review").count():
        with page.expect_navigation():
            page.click("#start-review")
        page.wait_for_load_state("networkidle")
        if page.locator("#verdict-form").count() and page.is_visible("#verdict-form"):
            page.keyboard.press("c")  # confirmed
            page.keyboard.press("Enter")
            wait_until(
                page,
                "document.getElementById('desk-msg').textContent.length > 0"
                " || !document.getElementById('desk-empty').hidden",
            )
        return "desk verdict"
    forms = page.locator("form[method=get]")
    if forms.count():
        button = forms.first.locator("button[type=submit], input[type=submit], button:not([type])")
        if button.count():
            with page.expect_navigation():
                button.first.click()
            page.wait_for_load_state("networkidle")
            return "filter form"
    return None


@pytest.mark.parametrize("label, role, adjudicator", SIGN_INS, ids=[s[0] for s in SIGN_INS])
def test_no_page_of_any_role_trips_the_policy(
    label: str,
    role: str,
    adjudicator: bool | None,  # type: ignore[no-untyped-def]
    demo: seed.SeedResult,
    server: LiveServer,
    csp_page,
) -> None:
    page = csp_page
    ids = sample_ids(demo)
    found: list[str] = []
    login = page.goto(f"{server.url}/login")
    assert login is not None
    assert_strict_policy(login, "/login")
    who = demo.sign_in(role, adjudicator=adjudicator)
    browser_sign_in(page, server.url, who.email, who.password)
    assert "/login" not in page.url, f"{who.email} could not sign in"
    drain(page, "/login", found)

    paths = page_routes(server.app, role)
    if role == "reviewer" and not adjudicator:
        paths = [p for p in paths if not p.startswith("/review/adjudication")]
    assert len(paths) >= 3, paths
    html_pages, used = 0, []
    for path in paths:
        url = fill(path, ids)
        probe = page.request.get(f"{server.url}{url}", max_redirects=0)
        if "attachment" in probe.headers.get("content-disposition", ""):
            if probe.headers.get("content-type", "").startswith("text/html"):
                assert_strict_policy(probe, url)  # a download: the browser never renders it
            continue
        response = page.goto(f"{server.url}{url}")
        assert response is not None, url
        assert response.status < 500, (url, response.status)
        if not response.headers.get("content-type", "").startswith("text/html"):
            continue
        html_pages += 1
        assert_strict_policy(response, url)
        page.wait_for_load_state("networkidle")
        drain(page, url, found)
        action = use_main_control(page, path, server.url)
        if action:
            used.append(f"{url}: {action}")
            drain(page, f"{url} after {action}", found)
    assert not found, "\n".join(found)
    assert html_pages >= 3, (label, html_pages)
    if role in ("reviewer", "admin"):
        assert any("desk verdict" in u for u in used), used


def test_the_recorder_sees_a_refused_inline_script(
    demo: seed.SeedResult, server: LiveServer, csp_page
) -> None:  # type: ignore[no-untyped-def]
    """The check above can fail: an inline script added to a page is refused and recorded."""
    page = csp_page
    page.goto(f"{server.url}/login")
    page.evaluate("""() => { const s = document.createElement('script');
                             s.textContent = 'window.__ran = true'; document.body.appendChild(s); }""")
    wait_until(page, "window.__csp.length > 0")
    violations = page.evaluate("() => window.__csp")
    assert violations and violations[0].startswith("script-src"), violations
    assert page.evaluate("() => window.__ran === undefined")
