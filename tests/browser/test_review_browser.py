"""The listening desk in a real browser: keyboard-only verdicts, and no personal data for reviewers."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from sqlalchemy import select

from server.devices.models import Alert
from tests import factories
from tests.conftest import browser_sign_in, committed_session, wait_until

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
    wait_until(page, "document.querySelectorAll('#x-axis span').length > 0")

    page.keyboard.press("Space")
    wait_until(
        page,
        "!document.getElementById('player').paused && document.getElementById('player').currentTime > 0",
        timeout_ms=10000,
    )
    page.keyboard.press("Space")
    wait_until(page, "document.getElementById('player').paused")
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

    wait_until(page, f"document.querySelector('[data-f=alert_id]').textContent === '#{second}'")
    wait_until(
        page,
        "document.getElementById('spec').complete && document.getElementById('spec').naturalWidth > 0",
    )
    assert page.url.endswith(f"/review/{second}")
    assert not page.is_checked("input[name=label][value=false_alarm]")  # a clean form for the new clip
    # The next clip's time reads as the first one's did, in the trial's zone, not as a raw ISO string.
    shown = page.text_content("[data-f=local]")
    assert re.fullmatch(r"[A-Z][a-z]{2} \d{2} [A-Z][a-z]{2} \d{4}, \d{2}:\d{2}:\d{2}", shown), shown
    assert page.text_content("[data-f=timezone]") == "Europe/Berlin"
    wait_until(page, "document.getElementById('desk-msg').textContent.startsWith('Saved')")

    page.keyboard.press("c")
    page.keyboard.press("Enter")
    page.wait_for_selector("#desk-empty:not([hidden])")
    assert not page.is_visible("#desk")  # the last clip leaves the screen
    assert page.text_content("h1") == "Listening desk"
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


# --- the agreement page -------------------------------------------------------------------------------

# (first, second, drawn by the random rule, adjudicator's label) on the invented Fernhill pilot.
AGREEMENT_CLIPS = [
    ("confirmed", "confirmed", True, None),
    ("confirmed", "confirmed", True, None),
    ("confirmed", "confirmed", True, None),
    ("false_alarm", "false_alarm", True, None),
    ("false_alarm", "false_alarm", True, None),
    ("confirmed", "false_alarm", True, "confirmed"),
    ("unsure", "confirmed", False, "confirmed"),  # sent on for being unsure, not drawn
    ("unsure", "false_alarm", False, None),
]


def _seed_agreement(srv):
    from server.review.models import Verdict

    settings = srv.settings
    store = srv.app.state.clip_store
    start = dt.datetime.now(dt.UTC) - dt.timedelta(hours=3)
    with committed_session(settings) as s:
        fern = factories.make_trial(s, code="FERN-1", name="Fernhill pilot")
        other = factories.make_trial(s, code="MOSS-2", name="Mossgate pilot")
        r1, r2, judge = (factories.make_user(s, role="reviewer")[0] for _ in range(3))
        for trial, clips in ((fern, AGREEMENT_CLIPS), (other, [("confirmed", "false_alarm", True, None)])):
            device, _ = factories.make_device(s, trial)
            for i, (x, y, drawn, settled) in enumerate(clips):
                at = start + dt.timedelta(minutes=i)
                a = factories.make_alert(s, store, settings, device, now=at, detected_at=at)
                a.state = "final" if settled or x == y else "adjudication"
                s.add(Verdict(alert_id=a.id, reviewer_id=r1.id, round=1, label=x, random_draw=drawn))
                s.add(Verdict(alert_id=a.id, reviewer_id=r2.id, round=2, label=y))
                if settled:
                    s.add(Verdict(alert_id=a.id, reviewer_id=judge.id, round=3, label=settled))
        lead, password = factories.make_user(s, role="lead")
        return {"email": lead.email, "password": password}


def test_lead_reads_agreement_on_the_random_sample(live_server, page):
    from sklearn.metrics import cohen_kappa_score

    seed = _seed_agreement(live_server)
    base = live_server.url
    browser_sign_in(page, base, seed["email"], seed["password"])
    page.goto(f"{base}/review/agreement")
    # All trials: seven drawn pairs (Fernhill's six and Mossgate's one); nine pairs in all.
    assert page.text_content("#sample-size") == "7"
    assert "random draw picked" in page.text_content("#why-random")

    # Pick one trial from the list: the page reloads with its figures.
    with page.expect_navigation():
        page.select_option("#a-trial", "FERN-1")
    assert page.url.endswith("trial=FERN-1")
    drawn = [c for c in AGREEMENT_CLIPS if c[2]]
    kappa = cohen_kappa_score([c[0] for c in drawn], [c[1] for c in drawn])  # reference: scikit-learn
    pooled = cohen_kappa_score([c[0] for c in AGREEMENT_CLIPS], [c[1] for c in AGREEMENT_CLIPS])
    assert page.text_content("#sample-size") == "6"
    assert page.text_content("#kappa-all") == f"{kappa:.3f}"
    assert "95% confidence interval" in page.text_content("#kappa-interval")
    assert page.text_content("#kappa-pooled") == f"{pooled:.3f}"
    assert pooled < kappa

    # Unsure first verdicts: two, neither drawn; one settled as confirmed, one waiting.
    assert page.text_content("#unsure-count") == "2"
    confirmed_row = page.locator("#unsure tr[data-second=confirmed] td")
    assert confirmed_row.all_text_contents()[0] == "1"  # second said confirmed, settled confirmed
    false_row = page.locator("#unsure tr[data-second=false_alarm] td").all_text_contents()
    assert false_row[-2:] == ["1", "1"]  # not settled yet; total 1

    # Fleiss' kappa over the two adjudicated clips (three reviewers each); no gold checks.
    from statsmodels.stats.inter_rater import fleiss_kappa  # reference: statsmodels

    adjudicated = fleiss_kappa([[2, 1, 0, 0], [2, 0, 1, 0]])  # labels in the page's order
    assert page.text_content("#fleiss-adjudication") == f"{adjudicated:.3f}"
    assert page.text_content("#fleiss-gold") == "—"
    assert page.console_errors == []
