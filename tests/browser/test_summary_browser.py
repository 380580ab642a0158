"""The weekly summary page and its mailed HTML file in a real browser, with real data and SVG charts."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from pathlib import Path

import pytest

from server.devices.clipstore import ClipStore
from server.devices.models import ListeningSegment
from server.settings import Settings
from server.staged import service as staged_service
from tests import factories
from tests.conftest import LiveServer, browser_sign_in, committed_session

pytestmark = pytest.mark.browser

UTC = dt.UTC
W0 = dt.datetime(2026, 9, 28, tzinfo=UTC)  # Monday of 2026-W40
NOW = W0 + dt.timedelta(days=9)


@pytest.fixture
def server(tmp_path: Path) -> Iterator[tuple[LiveServer, str, str]]:
    """A live server over a committed pilot of four homes in the invented village of Wrenfold."""
    settings = Settings(data_dir=tmp_path / "srv", secret_key="summary-browser-" + "s" * 32)
    from server.cli_base import open_db

    open_db(settings)
    store = ClipStore(settings.clip_dir)
    store.ensure()
    with committed_session(settings) as s:
        trial = factories.make_trial(s, code="WREN-1", name="Wrenfold pilot", starts_on=dt.date(2026, 9, 7))
        lead, password = factories.make_user(s, role="lead")
        for n in range(4):
            device, _ = factories.make_device(s, trial)
            home = factories.make_installed_home(
                s,
                trial,
                device,
                installed_at=dt.datetime(2026, 9, 7, 9, tzinfo=UTC),
                room=("kitchen", "hallway")[n % 2],
            )
            s.add(
                ListeningSegment(
                    device_id=device.id,
                    started_at=dt.datetime(2026, 9, 8, tzinfo=UTC),
                    ended_at=W0 + dt.timedelta(days=7),
                    is_open=False,
                )
            )
            for k in range(2 + 3 * n):
                when = W0 - dt.timedelta(days=k % 14, hours=k)
                a = factories.make_alert(
                    s,
                    store,
                    settings,
                    device,
                    detected_at=when,
                    score=0.6 + 0.03 * k,
                    now=when + dt.timedelta(minutes=1),
                )
                a.state, a.final_label, a.final_method = "final", "false_alarm", "single"
                a.final_cause, a.final_resemblance = (
                    ("dog", "unrelated") if k % 2 else ("speech", "resembles")
                )
            start = W0 + dt.timedelta(days=2, hours=10 + n)
            staged_service.log_staged_event(
                s,
                home=home,
                sound_class="smoke_alarm",
                started_at=start,
                ended_at=start + dt.timedelta(seconds=45),
                source="test button, alarm on the landing",
            )
            if n != 3:
                hit = start + dt.timedelta(seconds=4 + n)
                a = factories.make_alert(
                    s, store, settings, device, detected_at=hit, score=0.9, now=hit + dt.timedelta(minutes=1)
                )
                a.state, a.final_label, a.final_method = "final", "confirmed", "single"
    with LiveServer(settings) as srv:
        srv.app.state.clock = lambda: NOW
        yield srv, lead.email, password


def test_summary_page_and_export_render_with_charts(server, page, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    srv, email, password = server
    browser_sign_in(page, srv.url, email, password)
    response = page.goto(f"{srv.url}/summary?trial=WREN-1")
    assert response is not None and response.status == 200
    page.wait_for_load_state("networkidle")
    assert page.inner_text("#summary-week") == "2026-W40"  # the last complete week by default
    assert "not a certified life-safety device" in page.inner_text("#caution")
    smoke = page.locator("#smoke_alarm-week")
    assert "3 of 4" in smoke.inner_text()  # staged events detected
    # The verdict carries the one rule; four homes are too few for a home-level interval; the
    # device tables say they are per device-month; disturbances stand beside alerts.
    to_date = page.locator("#smoke_alarm-to_date")
    assert "Met when the upper end of the 95% confidence interval" in to_date.locator("p.rule").inner_text()
    assert "too few homes to judge spread" in to_date.locator("p.home-level").inner_text()
    assert "device-month" in to_date.inner_text()
    assert "Disturbances (judged against the target)" in to_date.locator("table.side-by-side").inner_text()
    assert "Unusable clips: 0" in to_date.locator("p.unusable-line").inner_text()
    assert "Disturbance:" in page.inner_text("#definitions + .defs")
    # Smoke alarm has all five charts (trend, and per period the homes and the threshold trade-off);
    # the classes without alerts still draw their trend and (empty) homes charts.
    assert page.locator("#class-smoke_alarm svg.chart").count() == 5
    assert page.locator("svg.chart").count() == 11
    box = page.locator("#smoke_alarm-to_date svg.chart").first.bounding_box()
    assert box is not None and box["width"] > 300 and box["height"] > 100
    assert page.console_errors == []

    # Choose another week through the form.
    page.fill("#f-week", "2026-W39")
    with page.expect_navigation():
        page.click("form.choose button[type=submit]")
    assert page.inner_text("#summary-week") == "2026-W39"

    with page.expect_download() as info:
        page.click("#export-link")
    saved = tmp_path / "summary.html"
    info.value.save_as(saved)
    offline = page.context.browser.new_context(offline=True)  # type: ignore[union-attr]
    try:
        p2 = offline.new_page()
        p2.goto(saved.as_uri())
        assert p2.inner_text("#summary-week") == "2026-W39"
        assert p2.locator("#class-smoke_alarm svg.chart").count() == 5
        assert "not a certified life-safety device" in p2.inner_text("#caution")
        assert p2.locator("a.csv").count() == 0
    finally:
        offline.close()
