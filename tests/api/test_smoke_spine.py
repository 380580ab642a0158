from tests import factories


def test_health_answers_ok(client):
    r = client.get("/api/v1/health")
    assert r.status_code == 200
    assert r.json()["status"] == "ok"


def test_device_posts_heartbeat_and_alert(client, session):
    trial = factories.make_trial(session)
    device, token = factories.make_device(session, trial)
    h = {"Authorization": f"Bearer {token}"}
    import datetime as dt

    now = dt.datetime.now(dt.UTC).isoformat()
    r = client.post(
        "/api/v1/heartbeats", headers=h, json={"sent_at": now, "listening": True, "firmware": "1.0"}
    )
    assert r.status_code == 200, r.text
    import json

    clip = factories.sine_wav()
    meta = {
        "event_id": "e1",
        "sound_class": "smoke_alarm",
        "score": 0.8,
        "detected_at": now,
        "clip_offset_s": 0.2,
        "firmware": "1.0",
    }
    r = client.post(
        "/api/v1/alerts", headers=h, files={"meta": (None, json.dumps(meta)), "clip": ("c.wav", clip)}
    )
    assert r.status_code == 201, r.text
    r2 = client.post(
        "/api/v1/alerts", headers=h, files={"meta": (None, json.dumps(meta)), "clip": ("c.wav", clip)}
    )
    assert r2.status_code == 200 and r2.json() == {"alert_id": r.json()["alert_id"], "duplicate": True}
