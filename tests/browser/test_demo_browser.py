"""The seeded demo in a real browser: each main page opens for its role and logs no console errors."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator

import pytest
from sqlalchemy import select

from server.auth.models import User
from server.demo import seed
from server.devices.models import Alert, AlertState
from server.review.models import Verdict
from tests.conftest import LiveServer, browser_sign_in, committed_session

pytestmark = pytest.mark.browser

STARTS_ON = dt.date(2026, 3, 2)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> seed.SeedResult:
    return seed.seed_demo(tmp_path_factory.mktemp("demo"), seed=2, homes=8, weeks=3, starts_on=STARTS_ON)


@pytest.fixture(scope="module")
def server(demo: seed.SeedResult) -> Iterator[LiveServer]:
    with LiveServer(demo.settings) as srv:
        yield srv


def pages_for(demo: seed.SeedResult, role: str) -> list[tuple[str, str]]:
    """(path, text the page must show) for the role's main pages."""
    week = (demo.plan.end - dt.timedelta(days=7)).isocalendar()
    by_role = {
        "admin": [
            ("/devices", demo.plan.skewed_serial),
            ("/alerts", demo.code("cockatoo")),
            (f"/devices/{demo.plan.mover_serial}", demo.plan.mover_serial),
        ],
        "coordinator": [
            ("/homes", demo.code("cockatoo")),
            (f"/homes/{demo.code('mover_to')}", demo.plan.mover_serial),
            ("/quota", "aged 75"),
        ],
        "reviewer": [("/review", "Listening desk")],
        "lead": [
            ("/review/agreement", "Reviewer agreement"),
            (f"/summary?week={week.year}-W{week.week:02d}", demo.code("cockatoo")),
        ],
    }
    return by_role[role]


@pytest.mark.parametrize("role", ["admin", "coordinator", "reviewer", "lead"])
def test_main_pages_render_without_console_errors(
    role: str, demo: seed.SeedResult, server: LiveServer, page
) -> None:  # type: ignore[no-untyped-def]
    who = demo.sign_in(role, adjudicator=False if role == "reviewer" else None)
    browser_sign_in(page, server.url, who.email, who.password)
    assert "/login" not in page.url, f"{who.email} could not sign in"
    for path, text in pages_for(demo, role):
        response = page.goto(f"{server.url}{path}")
        assert response is not None and response.status == 200, (path, response and response.status)
        page.wait_for_load_state("networkidle")
        body = page.inner_text("body")
        assert text in body, (path, text)
        assert page.console_errors == [], (path, page.console_errors)


def test_the_listening_desk_hands_the_reviewer_a_clip_that_plays(
    demo: seed.SeedResult, server: LiveServer, page
) -> None:  # type: ignore[no-untyped-def]
    who = demo.sign_in("reviewer", adjudicator=False)
    browser_sign_in(page, server.url, who.email, who.password)
    page.goto(f"{server.url}/review")
    waiting = int(page.inner_text("#waiting-count"))
    assert waiting >= 4  # the demo leaves its newest clips for the reviewers
    with page.expect_navigation():
        page.click("#start-review")
    assert "/review/" in page.url and "empty" not in page.url
    page.wait_for_load_state("networkidle")
    audio = page.locator("audio")
    assert audio.count() >= 1
    duration = page.evaluate("""async () => {
        const a = document.querySelector('audio');
        if (a.readyState < 1) await new Promise(r => a.addEventListener('loadedmetadata', r, {once: true}));
        return a.duration; }""")
    assert duration == pytest.approx(10.0, abs=0.05)
    assert page.console_errors == []


def test_the_adjudicator_sees_the_disagreements_waiting(
    demo: seed.SeedResult, server: LiveServer, page
) -> None:  # type: ignore[no-untyped-def]
    who = demo.sign_in("reviewer", adjudicator=True)
    browser_sign_in(page, server.url, who.email, who.password)
    response = page.goto(f"{server.url}/review/adjudication")
    assert response is not None and response.status == 200
    page.wait_for_load_state("networkidle")
    # Every disagreement waiting, less those she gave a verdict on herself (another must settle them).
    with committed_session(demo.settings) as s:
        own = set(
            s.scalars(
                select(Verdict.alert_id)
                .join(User, User.id == Verdict.reviewer_id)
                .where(User.email == who.email)
            )
        )
        waiting_ids = set(s.scalars(select(Alert.id).where(Alert.state == AlertState.adjudication)))
    assert len(waiting_ids) == demo.counts["awaiting_adjudication"]
    assert f"({len(waiting_ids - own)})" in page.inner_text("h1")
    assert page.console_errors == []
