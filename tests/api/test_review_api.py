"""Review pages and JSON API: blindness, roles, images, the form flow, the agreement overview."""

from __future__ import annotations

import datetime as dt
import io
import json
import re
import zoneinfo

import numpy as np
import pytest
from PIL import Image
from sklearn.metrics import cohen_kappa_score
from sqlalchemy import select

from server.devices.models import Alert, AlertState
from server.review import image_cache, overview
from server.review.models import GoldAnswer, GoldCheck, Verdict
from tests import factories
from tests.conftest import csrf_of

T0 = dt.datetime.now(dt.UTC).replace(microsecond=0) - dt.timedelta(hours=3)
FIRST_NOTE = "kettle-whistle-7731"


def _alerts(session, store, settings, trial, n, **kw):
    device, _ = factories.make_device(session, trial)
    return [
        factories.make_alert(
            session,
            store,
            settings,
            device,
            now=T0 + dt.timedelta(minutes=i),
            detected_at=T0 + dt.timedelta(minutes=i),
            **kw,
        )
        for i in range(n)
    ]


def _json(c, method, url, body=None):
    return c.request(method, url, json=body, headers={"X-CSRF-Token": csrf_of(c)})


def _health_ok(client):
    assert client.get("/api/v1/health").status_code == 200


# --- the JSON API round trip ---------------------------------------------------------------------------


def test_claim_and_verdict_over_the_api(client, staff_client, session, store, settings, trial):
    trial.second_review_share = 0.0
    a = _alerts(session, store, settings, trial, 3)
    rev = staff_client("reviewer")
    r = _json(rev, "POST", "/api/v1/review/claims", {})
    assert r.status_code == 200, r.text
    q = r.json()
    assert (q["current"]["alert_id"], q["next"]["alert_id"]) == (a[0].id, a[1].id)
    assert q["current"]["audio_url"] == f"/clips/{a[0].id}/audio"
    assert q["current"]["causes"][0] == {"code": "speech", "label": "Speech or shouting", "key": "1"}
    r = _json(
        rev,
        "POST",
        f"/api/v1/alerts/{a[0].id}/verdicts",
        {"label": "false_alarm", "cause": "appliance", "resemblance": "resembles", "note": "fridge"},
    )
    assert r.status_code == 201, r.text
    assert r.json()["label"] == "false_alarm" and r.json()["cause"] == "appliance"
    session.expire_all()
    alert = session.get(Alert, a[0].id)
    assert (alert.final_label, alert.final_method) == ("false_alarm", "single")
    q = _json(rev, "POST", "/api/v1/review/claims", {}).json()
    assert (q["current"]["alert_id"], q["next"]["alert_id"]) == (a[1].id, a[2].id)


def test_bad_verdict_is_refused_with_a_code(client, staff_client, session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    rev = staff_client("reviewer")
    _json(rev, "POST", "/api/v1/review/claims", {})
    r = _json(
        rev,
        "POST",
        f"/api/v1/alerts/{a[0].id}/verdicts",
        {"label": "false_alarm", "resemblance": "unrelated"},
    )
    assert r.status_code == 422 and r.json()["error"]["code"] == "validation_failed"
    assert "cause" in r.json()["error"]["fields"]
    r = _json(rev, "POST", f"/api/v1/alerts/{a[0].id}/verdicts", {"label": "confirmed", "score": 1})
    assert r.status_code == 422 and r.json()["error"]["code"] == "invalid_request"
    r = _json(rev, "POST", "/api/v1/alerts/999999/verdicts", {"label": "confirmed"})
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_alert"
    other = staff_client("reviewer")
    r = _json(other, "POST", f"/api/v1/alerts/{a[0].id}/verdicts", {"label": "confirmed"})
    assert r.status_code == 409 and r.json()["error"]["code"] == "claim_lost"
    r = rev.post(f"/api/v1/alerts/{a[0].id}/verdicts", json={"label": "confirmed"})  # no CSRF header
    assert r.status_code == 403 and r.json()["error"]["code"] == "csrf_failed"
    _health_ok(client)


# --- blind second review --------------------------------------------------------------------------


def test_second_reviewer_sees_nothing_of_the_first_verdict(
    client, staff_client, session, store, settings, trial
):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 2)
    first = staff_client("reviewer", name="Ottoline Frist")
    second = staff_client("reviewer", name="Bartholomew Zweit")
    q1 = _json(first, "POST", "/api/v1/review/claims", {}).json()
    assert q1["current"]["alert_id"] == a[0].id
    r = _json(
        first,
        "POST",
        f"/api/v1/alerts/{a[0].id}/verdicts",
        {"label": "false_alarm", "cause": "tools_building", "resemblance": "unrelated", "note": FIRST_NOTE},
    )
    assert r.status_code == 201
    # Release the first reviewer's other clip so a fresh (first-round) one is available to compare with.
    _json(first, "DELETE", "/api/v1/review/claims")

    q2 = _json(second, "POST", "/api/v1/review/claims", {})
    assert q2.status_code == 200
    body = q2.json()
    assert body["current"]["alert_id"] == a[0].id  # the second review, blind
    assert body["next"]["alert_id"] == a[1].id  # a first review
    # Same shape either way, and none of the first verdict inside.
    assert set(body["current"]) == set(body["next"])
    for forbidden in ("label", "cause", "resemblance", "note", "round", "state", "verdict", "first"):
        assert forbidden not in body["current"]
    text = q2.text
    assert (
        FIRST_NOTE not in text
        and "Ottoline" not in text
        and 'tools_building",' not in text.split("causes")[0]
    )
    item = second.get(f"/api/v1/review/items/{a[0].id}")
    assert item.status_code == 200 and FIRST_NOTE not in item.text and "Ottoline" not in item.text

    page = second.get(f"/review/{a[0].id}")
    assert page.status_code == 200
    html = page.text
    assert FIRST_NOTE not in html and "Ottoline" not in html
    assert not re.search(r"<input[^>]+type=\"radio\"[^>]*checked", html)  # nothing pre-selected
    # The verdict panel and the page data are those of any clip, apart from the clip's own facts.
    fresh = second.get(f"/review/{a[1].id}").text

    def panel(h: str, alert_id: int) -> str:
        form = re.search(r'<form class="desk-side".*?</form>', h, re.S).group(0)
        return re.sub(r'name="csrf_token" value="[^"]*"', "", form).replace(
            f"/review/{alert_id}", "/review/ID"
        )

    def data(h: str) -> dict:
        return json.loads(
            re.search(r'<script type="application/json" id="desk-data">(.*?)</script>', h, re.S).group(1)
        )

    assert panel(html, a[0].id) == panel(fresh, a[1].id)
    blind, plain = data(html), data(fresh)
    assert set(blind) == set(plain) and set(blind["current"]) == set(plain["current"])
    assert blind["mode"] == plain["mode"] == "desk"


def test_adjudicator_sees_both_verdicts_and_settles(client, staff_client, session, store, settings, trial):
    trial.second_review_share = 1.0
    a = _alerts(session, store, settings, trial, 1)
    r1 = staff_client("reviewer", name="Ottoline Frist")
    r2 = staff_client("reviewer")
    judge = staff_client("reviewer", is_adjudicator=True)
    _json(r1, "POST", "/api/v1/review/claims", {})
    _json(r1, "POST", f"/api/v1/alerts/{a[0].id}/verdicts", {"label": "confirmed", "note": FIRST_NOTE})
    _json(r2, "POST", "/api/v1/review/claims", {})
    r = _json(
        r2,
        "POST",
        f"/api/v1/alerts/{a[0].id}/verdicts",
        {"label": "false_alarm", "cause": "other_alarm_beep", "resemblance": "resembles"},
    )
    assert r.status_code == 201
    assert r2.get("/review/adjudication").status_code == 403
    lst = judge.get("/api/v1/review/adjudications").json()
    assert [c["item"]["alert_id"] for c in lst] == [a[0].id]
    assert [(v["round"], v["label"], v["reviewer"]) for v in lst[0]["verdicts"]] == [
        (1, "confirmed", "Ottoline Frist"),
        (2, "false_alarm", r2.user.name),
    ]
    page = judge.get(f"/review/adjudication/{a[0].id}")
    assert page.status_code == 200 and FIRST_NOTE in page.text and "Ottoline Frist" in page.text
    r = judge.post(
        f"/review/adjudication/{a[0].id}",
        data={
            "csrf_token": csrf_of(judge),
            "label": "false_alarm",
            "cause": "other_alarm_beep",
            "resemblance": "resembles",
        },
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == "/review/adjudication"
    session.expire_all()
    alert = session.get(Alert, a[0].id)
    assert (alert.final_label, alert.final_cause, alert.final_method) == (
        "false_alarm",
        "other_alarm_beep",
        "adjudicated",
    )
    r = _json(judge, "POST", f"/api/v1/alerts/{a[0].id}/adjudication", {"label": "confirmed"})
    assert r.status_code == 409 and r.json()["error"]["code"] == "not_awaiting_adjudication"
    _health_ok(client)


# --- the page flow without JavaScript --------------------------------------------------------------------


def test_form_flow_claims_shows_and_moves_on(client, staff_client, session, store, settings):
    trial = factories.make_trial(session, timezone="Europe/Lisbon")
    trial.second_review_share = 0.0
    device, _ = factories.make_device(session, trial)
    home = factories.make_home(session, trial)
    factories.make_installation(
        session, device, home, room="living_room", installed_at=T0 - dt.timedelta(days=1)
    )
    a = [
        factories.make_alert(
            session,
            store,
            settings,
            device,
            now=T0 + dt.timedelta(minutes=i),
            detected_at=T0 + dt.timedelta(minutes=i),
            score=0.83,
        )
        for i in range(2)
    ]
    rev = staff_client("reviewer")
    home_page = rev.get("/review")
    assert home_page.status_code == 200 and 'id="waiting-count">2<' in home_page.text
    r = rev.post(
        "/review/next",
        data={"csrf_token": csrf_of(rev), "trial": trial.code, "sound_class": ""},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == f"/review/{a[0].id}"
    page = rev.get(r.headers["location"])
    assert page.status_code == 200
    html = page.text
    local = a[0].detected_at.astimezone(zoneinfo.ZoneInfo("Europe/Lisbon"))
    assert local.strftime("%H:%M:%S") in html and "Europe/Lisbon" in html
    assert home.code in html and "living room" in html and "0.83" in html and "smoke alarm" in html
    for key in (
        "<kbd>C</kbd>",
        "<kbd>F</kbd>",
        "<kbd>U</kbd>",
        "<kbd>X</kbd>",
        "<kbd>1</kbd>",
        "<kbd>=</kbd>",
        "<kbd>Space</kbd>",
        "<kbd>Enter</kbd>",
        "<kbd>S</kbd>",
        "<kbd>D</kbd>",
        "<kbd>P</kbd>",
    ):
        assert key in html
    assert "frequency, kHz" in html and "time, s" in html
    r = rev.post(
        f"/review/{a[0].id}",
        data={"csrf_token": csrf_of(rev), "label": "confirmed", "cause": "dog", "note": ""},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == f"/review/{a[1].id}"
    session.expire_all()
    assert session.get(Alert, a[0].id).final_label == "confirmed"
    assert session.get(Alert, a[0].id).final_cause is None  # a stale cause radio is dropped
    r = rev.post(
        f"/review/{a[1].id}",
        data={"csrf_token": csrf_of(rev), "label": "false_alarm"},
        follow_redirects=False,
    )
    assert r.status_code == 422 and "A false alarm needs a cause." in r.text
    r = rev.post(
        f"/review/{a[1].id}", data={"csrf_token": csrf_of(rev), "label": "unusable"}, follow_redirects=False
    )
    assert r.status_code == 303 and r.headers["location"] == "/review?empty=1"
    assert 'id="queue-empty"' in rev.get("/review?empty=1").text


# --- roles ----------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "role,path,status",
    [
        ("lead", "/review", 403),
        ("coordinator", "/review", 403),
        ("reviewer", "/review", 200),
        ("reviewer", "/review/agreement", 403),
        ("lead", "/review/agreement", 200),
        ("admin", "/review/agreement", 200),
        ("reviewer", "/review/gold", 403),
        ("coordinator", "/review/gold", 200),
        ("reviewer", "/review/adjudication", 403),
        ("admin", "/review/adjudication", 200),
        ("lead", "/api/v1/review/overview", 200),
        ("reviewer", "/api/v1/review/overview", 403),
        ("coordinator", "/api/v1/gold-checks", 200),
        ("lead", "/api/v1/gold-checks", 403),
    ],
)
def test_review_pages_by_role(staff_client, role, path, status):
    c = staff_client(role)
    assert c.get(path).status_code == status


def test_signed_out_api_call_is_401(client):
    r = client.post("/api/v1/review/claims", json={})
    assert r.status_code == 401 and r.json()["error"]["code"] == "not_signed_in"


# --- images ---------------------------------------------------------------------------------------


def test_clip_images_are_served_cached_and_guarded(client, staff_client, session, store, settings, trial):
    device, _ = factories.make_device(session, trial)
    clip = factories.sine_wav(seconds=4.0, freq=2000.0)
    alert = factories.make_alert(session, store, settings, device, clip=clip, clip_offset_s=1.5)
    rev = staff_client("reviewer")
    r = rev.get(f"/review/images/{alert.id}/spectrogram.png")
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    img = Image.open(io.BytesIO(r.content))
    assert img.size == (500, 257)  # 4 s at hop 128, 512-point FFT
    arr = np.asarray(img.convert("L"), dtype=float)
    peak_row = int(np.argmax(arr.mean(axis=1)))
    assert abs((256 - peak_row) * 16000 / 512 - 2000.0) <= 16000 / 512
    assert image_cache.path_for(settings.cache_dir, alert.clip.sha256, "spectrogram").is_file()
    meta = rev.get(f"/review/images/{alert.id}/meta.json").json()
    assert meta["nyquist_khz"] == 8.0 and meta["duration_s"] == pytest.approx(4.0)
    assert meta["time_ticks_s"] == [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0]
    wave = rev.get(f"/review/images/{alert.id}/waveform.png")
    assert wave.status_code == 200 and Image.open(io.BytesIO(wave.content)).size == (1000, 96)
    assert rev.get(f"/review/images/{alert.id}/other.png").status_code == 404
    assert staff_client("lead").get(f"/review/images/{alert.id}/waveform.png").status_code == 403
    session.get(Alert, alert.id).private_flag = True
    session.flush()
    r = rev.get(f"/review/images/{alert.id}/spectrogram.png")
    assert r.status_code == 403 and "private content" in r.text
    assert staff_client("admin").get(f"/review/images/{alert.id}/spectrogram.png").status_code == 200
    # Cached files go when the clip is purged.
    assert image_cache.forget(settings.cache_dir, alert.clip.sha256) == 3
    assert not image_cache.path_for(settings.cache_dir, alert.clip.sha256, "meta").exists()
    _health_ok(client)


def test_images_are_drawn_when_clips_are_handed_out_not_at_ingest(fresh_settings):
    """Ingest only stores the clip; claiming draws the current and the next clip's images."""
    import hashlib

    from fastapi.testclient import TestClient

    from server.app import create_app
    from server.auth import service as auth_service
    from tests.conftest import committed_session

    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        trial.second_review_share = 0.0
        _, token = factories.make_device(s, trial)
        reviewer, _ = factories.make_user(s, role="reviewer")
        _, staff_token = auth_service.create_api_token(s, reviewer, "test")
    app = create_app(fresh_settings)
    clips = [factories.sine_wav(seconds=2.0, freq=f) for f in (500.0, 900.0, 1300.0)]
    shas = [hashlib.sha256(c).hexdigest() for c in clips]
    with TestClient(app) as c:
        for n, clip in enumerate(clips):
            meta = {
                "event_id": f"img-{n}",
                "sound_class": "smoke_alarm",
                "score": 0.9,
                "detected_at": dt.datetime.now(dt.UTC).isoformat(),
                "clip_offset_s": 0.4,
                "firmware": "1.0",
            }
            r = c.post(
                "/api/v1/alerts",
                headers={"Authorization": f"Bearer {token}"},
                files={"meta": (None, json.dumps(meta)), "clip": ("c.wav", clip)},
            )
            assert r.status_code == 201, r.text
        app.state.background.submit(lambda: None).result(timeout=30)  # one worker: drains the queue
        assert [image_cache.cached_meta(fresh_settings.cache_dir, sha) for sha in shas] == [None] * 3
        r = c.post("/api/v1/review/claims", json={}, headers={"Authorization": f"Bearer {staff_token}"})
        assert r.status_code == 200, r.text
        app.state.background.submit(lambda: None).result(timeout=30)
    cached = [image_cache.cached_meta(fresh_settings.cache_dir, sha) for sha in shas]
    assert cached[0] is not None and cached[0].duration_s == pytest.approx(2.0)
    assert cached[1] is not None and cached[2] is None  # the current and the next clip only
    assert image_cache.path_for(fresh_settings.cache_dir, shas[0], "spectrogram").is_file()


# --- gold checks through the page -----------------------------------------------------------------


def test_coordinator_marks_gold_check_on_page(staff_client, session, store, settings, trial):
    a = _alerts(session, store, settings, trial, 1)
    coord = staff_client("coordinator")
    r = coord.post(
        "/review/gold",
        data={
            "csrf_token": csrf_of(coord, "/review/gold"),
            "alert_id": str(a[0].id),
            "expected_label": "false_alarm",
            "expected_cause": "dog",
        },
        follow_redirects=False,
    )
    assert r.status_code == 303
    gold = session.scalars(select(GoldCheck)).one()
    assert (gold.alert_id, gold.expected_label, gold.expected_cause) == (a[0].id, "false_alarm", "dog")
    r = coord.post(
        "/review/gold",
        data={
            "csrf_token": csrf_of(coord, "/review/gold"),
            "alert_id": str(a[0].id),
            "expected_label": "confirmed",
        },
        follow_redirects=False,
    )
    assert r.status_code == 422 and "already a gold check" in r.text


# --- agreement overview ---------------------------------------------------------------------------


def test_agreement_overview_figures(staff_client, session, store, settings, trial):
    rng = np.random.default_rng(42)
    labels = ["confirmed", "false_alarm", "unsure", "unusable"]
    n = 24
    a = _alerts(session, store, settings, trial, n + 2)
    r1 = factories.make_user(session, role="reviewer", name="Reviewer One")[0]
    r2 = factories.make_user(session, role="reviewer", name="Reviewer Two")[0]
    first, second = [], []
    for i, alert in enumerate(a[:n]):
        x = labels[int(rng.integers(0, 2))]
        y = x if rng.random() < 0.75 else labels[int(rng.integers(0, 4))]
        first.append(x)
        second.append(y)
        when = T0 + dt.timedelta(minutes=2 * i)
        session.add(Verdict(alert_id=alert.id, reviewer_id=r1.id, round=1, label=x, created_at=when))
        session.add(
            Verdict(
                alert_id=alert.id,
                reviewer_id=r2.id,
                round=2,
                label=y,
                created_at=when + dt.timedelta(minutes=1),
            )
        )
        alert.state, alert.final_label, alert.final_method = (
            AlertState.final,
            y,
            "agreed" if x == y else "adjudicated",
        )
    # Two alerts still waiting.
    gold = GoldCheck(alert_id=a[0].id, expected_label="confirmed")
    session.add(gold)
    session.flush()
    session.add(
        GoldAnswer(
            gold_check_id=gold.id,
            reviewer_id=r2.id,
            label="confirmed",
            correct=True,
            created_at=T0 + dt.timedelta(hours=1),
        )
    )
    session.flush()
    now = T0 + dt.timedelta(hours=2)
    ov = overview.review_overview(session, trial.id, now=now)
    agreed = sum(x == y for x, y in zip(first, second, strict=True))
    assert ov.double_reviewed == n
    assert ov.percent_agreement.estimate == pytest.approx(agreed / n)
    assert ov.kappa_overall.estimate == pytest.approx(
        cohen_kappa_score(first, second, labels=labels), abs=1e-12
    )
    assert [(p.reviewer_a, p.reviewer_b, p.shared) for p in ov.pair_kappas] == [
        ("Reviewer One", "Reviewer Two", n)
    ]
    assert ov.pair_kappas[0].kappa.estimate == pytest.approx(ov.kappa_overall.estimate)
    import krippendorff

    codes = {lab: i for i, lab in enumerate(labels)}
    ref = krippendorff.alpha(
        reliability_data=np.array([[codes[x] for x in first], [codes[y] for y in second]], dtype=float),
        level_of_measurement="nominal",
    )
    assert ov.alpha.estimate == pytest.approx(ref, abs=1e-12)
    assert int(ov.confusion.counts.trace()) == agreed and ov.confusion.n == n
    assert ov.backlog.count == 2
    assert ov.backlog.oldest_age_s == pytest.approx((now - a[n].received_at).total_seconds())
    quality = {q.name: q for q in ov.reviewers}
    assert quality["Reviewer Two"].gold.successes == 1 and quality["Reviewer Two"].gold.n == 1
    assert quality["Reviewer One"].gold is None
    # Reviewer One: 24 verdicts 2 minutes apart -> 23 counted clips in 46 minutes = 30 per hour.
    assert quality["Reviewer One"].throughput.clips_per_hour == pytest.approx(30.0)
    assert ov.by_state["pending"] == 2 and ov.final_by_method["agreed"] == agreed

    lead = staff_client("lead")
    body = lead.get(f"/api/v1/review/overview?trial={trial.code}").json()
    assert body["double_reviewed"] == n and body["backlog"]["count"] == 2
    assert body["kappa"]["estimate"] == pytest.approx(ov.kappa_overall.estimate)
    # Rows written without a recorded draw count by the data: no first verdict here is unsure, so
    # all 24 pairs are the random sample and the pooled figure is the same.
    assert body["sample"]["drawn"] == n and body["pooled"]["double_reviewed"] == n
    assert body["kappa"]["low"] < body["kappa"]["estimate"] < body["kappa"]["high"]
    assert body["kappa"]["method"] == "fleiss-cohen-everitt" and body["kappa"]["confidence_level"] == 0.95
    assert body["unsure_resolution"]["first_unsure"] == 0
    assert body["fleiss"]["gold"]["clips"] == 0 and body["fleiss"]["gold"]["reason"]
    page = lead.get(f"/review/agreement?trial={trial.code}")
    assert page.status_code == 200
    assert f'id="kappa-all">{ov.kappa_overall.estimate:.3f}<' in page.text
    assert f'id="alpha">{ov.alpha.estimate:.3f}<' in page.text
    assert "Reviewer One" in page.text and json.dumps(n) in page.text
