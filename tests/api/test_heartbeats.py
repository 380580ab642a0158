"""Heartbeats into listening segments, clock skew and the strict heartbeat body, on both backends.

The service is driven with explicit ``now`` values; the HTTP route with ``app.state.clock`` replaced
by a clock the test moves by hand.
"""

from __future__ import annotations

import datetime as dt
import json
import random
from typing import Any

import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.devices import service
from server.devices.models import Device, FirmwareChange, ListeningSegment
from server.devices.schemas import HeartbeatIn
from server.settings import Settings
from tests import factories

T0 = dt.datetime(2026, 3, 2, 8, 0, 0, tzinfo=dt.UTC)
S = dt.timedelta(seconds=1)


class Clock:
    """A server clock the test moves by hand."""

    def __init__(self, now: dt.datetime) -> None:
        self.now = now

    def __call__(self) -> dt.datetime:
        return self.now

    def advance(self, seconds: float) -> dt.datetime:
        self.now += dt.timedelta(seconds=seconds)
        return self.now


def beat(*, listening: bool = True, sent_at: dt.datetime, firmware: str = "3.1.0") -> HeartbeatIn:
    return HeartbeatIn(sent_at=sent_at, listening=listening, firmware=firmware)


def segments(session: Session, device: Device) -> list[tuple[dt.datetime, dt.datetime, bool, int]]:
    session.expire_all()
    rows = session.scalars(
        select(ListeningSegment)
        .where(ListeningSegment.device_id == device.id)
        .order_by(ListeningSegment.started_at, ListeningSegment.id)
    )
    return [(r.started_at, r.ended_at, r.is_open, r.heartbeats) for r in rows]


@pytest.fixture
def device(session: Session, trial) -> tuple[Device, str]:  # type: ignore[no-untyped-def]
    return factories.make_device(session, trial)


@pytest.fixture
def plain_settings() -> Settings:
    return Settings()  # the documented defaults: 60 s interval, gap 3 x interval, 10 % jitter, 5 min skew


def record(
    session: Session,
    dev: Device,
    settings: Settings,
    now: dt.datetime,
    *,
    listening: bool = True,
    skew_s: float = 0.0,
) -> tuple[dt.datetime, int]:
    return service.record_heartbeat(
        session,
        device=dev,
        settings=settings,
        now=now,
        beat=beat(listening=listening, sent_at=now + skew_s * S),
    )


# --- segments from the service ------------------------------------------------------------------


def test_beats_within_the_gap_extend_one_segment(session: Session, device, plain_settings: Settings) -> None:  # type: ignore[no-untyped-def]
    dev, _ = device
    for t in (0, 60, 125, 305):  # the last gap is exactly 3 x 60 s: the tolerance is inclusive
        record(session, dev, plain_settings, T0 + t * S)
    assert segments(session, dev) == [(T0, T0 + 305 * S, True, 4)]


def test_a_longer_gap_closes_the_segment_and_opens_a_new_one(
    session: Session,
    device,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    record(session, dev, plain_settings, T0)
    record(session, dev, plain_settings, T0 + 60 * S)
    record(session, dev, plain_settings, T0 + 241 * S)  # 181 s after the last beat
    record(session, dev, plain_settings, T0 + 300 * S)
    assert segments(session, dev) == [(T0, T0 + 60 * S, False, 2), (T0 + 241 * S, T0 + 300 * S, True, 2)]


def test_not_listening_closes_the_segment_at_its_last_listening_beat(
    session: Session,
    device,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    record(session, dev, plain_settings, T0)
    record(session, dev, plain_settings, T0 + 60 * S)
    record(session, dev, plain_settings, T0 + 90 * S, listening=False)
    record(session, dev, plain_settings, T0 + 150 * S, listening=False)  # nothing open: nothing changes
    assert segments(session, dev) == [(T0, T0 + 60 * S, False, 2)]
    record(session, dev, plain_settings, T0 + 200 * S)  # listening again, within the gap: a new segment
    assert segments(session, dev)[-1] == (T0 + 200 * S, T0 + 200 * S, True, 1)
    assert len(segments(session, dev)) == 2
    assert dev.last_seen_at == T0 + 200 * S


def test_gap_tolerance_follows_the_device_interval(session: Session, trial, plain_settings: Settings) -> None:  # type: ignore[no-untyped-def]
    dev, _ = factories.make_device(session, trial, heartbeat_interval_s=20)
    record(session, dev, plain_settings, T0)
    record(session, dev, plain_settings, T0 + 60 * S)  # 3 x 20 s: still inside
    record(session, dev, plain_settings, T0 + 121 * S)  # 61 s: outside
    assert [s[:3] for s in segments(session, dev)] == [
        (T0, T0 + 60 * S, False),
        (T0 + 121 * S, T0 + 121 * S, True),
    ]


def test_gap_factor_comes_from_settings(session: Session, device) -> None:  # type: ignore[no-untyped-def]
    dev, _ = device
    settings = Settings(heartbeat_gap_factor=1.5)
    record(session, dev, settings, T0)
    record(session, dev, settings, T0 + 90 * S)
    record(session, dev, settings, T0 + 181 * S)
    assert len(segments(session, dev)) == 2


def test_segments_of_two_devices_are_separate(session: Session, trial, plain_settings: Settings) -> None:  # type: ignore[no-untyped-def]
    (a, _), (b, _) = factories.make_device(session, trial), factories.make_device(session, trial)
    record(session, a, plain_settings, T0)
    record(session, b, plain_settings, T0 + 30 * S)
    record(session, a, plain_settings, T0 + 60 * S)
    record(session, b, plain_settings, T0 + 90 * S, listening=False)
    assert segments(session, a) == [(T0, T0 + 60 * S, True, 2)]
    assert segments(session, b) == [(T0 + 30 * S, T0 + 30 * S, False, 1)]


def test_listening_seconds_clip_segments_to_the_window(
    session: Session,
    device,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    for t in range(0, 601, 60):  # 10 minutes of listening
        record(session, dev, plain_settings, T0 + t * S)
    record(session, dev, plain_settings, T0 + 3600 * S)  # a new one-beat segment: no duration
    for t in range(3660, 3901, 60):
        record(session, dev, plain_settings, T0 + t * S)
    got = service.listening_seconds(session, [dev.id], T0 + 300 * S, T0 + 3700 * S)
    assert got == {dev.id: pytest.approx(300.0 + 100.0)}


# --- skew ----------------------------------------------------------------------------------------


def test_clock_skew_is_recorded_from_each_beat(session: Session, device, plain_settings: Settings) -> None:  # type: ignore[no-untyped-def]
    dev, _ = device
    record(session, dev, plain_settings, T0, skew_s=-42.5)
    assert dev.clock_skew_s == pytest.approx(-42.5)
    record(session, dev, plain_settings, T0 + 60 * S, skew_s=7.25)
    assert dev.clock_skew_s == pytest.approx(7.25)
    assert dev.firmware == "3.1.0"


def test_a_change_of_reported_firmware_is_recorded_once(
    session: Session,
    device,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    for t, firmware in ((0, "3.1.0"), (60, "3.1.0"), (120, "3.2.0"), (180, "3.2.0"), (240, "3.1.0")):
        service.record_heartbeat(
            session,
            device=dev,
            settings=plain_settings,
            now=T0 + t * S,
            beat=beat(sent_at=T0 + t * S, firmware=firmware),
        )
    rows = session.execute(
        select(FirmwareChange.at, FirmwareChange.firmware)
        .where(FirmwareChange.device_id == dev.id)
        .order_by(FirmwareChange.at)
    ).all()
    # The first report (the device had none), the upgrade, and the roll-back; repeats add nothing.
    assert [(r.at, r.firmware) for r in rows] == [
        (T0, "3.1.0"),
        (T0 + 120 * S, "3.2.0"),
        (T0 + 240 * S, "3.1.0"),
    ]
    assert dev.firmware == "3.1.0"
    assert segments(session, dev) == [(T0, T0 + 240 * S, True, 5)]  # listening goes on through it


def _http_beat(client: Any, token: str, sent_at: dt.datetime, **kw: Any) -> Any:
    body = {"sent_at": sent_at.isoformat(), "listening": True, "firmware": "3.1.0"} | kw
    return client.post("/api/v1/heartbeats", json=body, headers={"Authorization": f"Bearer {token}"})


def test_devices_off_by_more_than_five_minutes_are_flagged(
    app,
    client,
    session: Session,
    trial,  # type: ignore[no-untyped-def]
    staff_client,
) -> None:
    clock = Clock(T0)
    app.state.clock = clock
    skews = {"ahead": 301.0, "behind": -420.0, "edge": 300.0, "close": -12.0}
    serials = {}
    for name, skew in skews.items():
        dev, tok = factories.make_device(session, trial, serial=f"SK-{name}")
        serials[name] = dev.serial
        assert _http_beat(client, tok, T0 + skew * S).status_code == 200
    coordinator = staff_client("coordinator")
    rows = {d["serial"]: d for d in coordinator.get("/api/v1/devices").json()}
    for name, skew in skews.items():
        row = rows[serials[name]]
        assert row["clock_skew_s"] == pytest.approx(skew)
        assert row["clock_skewed"] is (abs(skew) > 300), name
    page = coordinator.get("/devices")
    assert page.status_code == 200
    flagged = page.text.count("device clock differs from the server")
    assert flagged == 2
    assert "+301 s</span>" in page.text and "-420 s</span>" in page.text


# --- the HTTP route with a controllable clock ----------------------------------------------------


def test_http_heartbeats_build_segments_on_server_time(app, client, session: Session, device) -> None:  # type: ignore[no-untyped-def]
    dev, tok = device
    clock = Clock(T0)
    app.state.clock = clock
    device_clock_ahead = 45 * S  # device time is never used for monitored time
    r = _http_beat(client, tok, clock.now + device_clock_ahead)
    assert r.status_code == 200, r.text
    assert r.json()["received_at"] == "2026-03-02T08:00:00Z"
    for step in (60, 60, 170):
        clock.advance(step)
        assert _http_beat(client, tok, clock.now + device_clock_ahead).status_code == 200
    clock.advance(200)  # a longer gap
    assert _http_beat(client, tok, clock.now + device_clock_ahead).status_code == 200
    clock.advance(60)
    assert _http_beat(client, tok, clock.now + device_clock_ahead, listening=False).status_code == 200
    assert segments(session, dev) == [(T0, T0 + 290 * S, False, 4), (T0 + 490 * S, T0 + 490 * S, False, 1)]
    assert session.get(Device, dev.id).clock_skew_s == pytest.approx(45.0)  # type: ignore[union-attr]


def test_next_heartbeat_interval_is_jittered_within_ten_percent(app, client, device) -> None:  # type: ignore[no-untyped-def]
    _, tok = device
    clock = Clock(T0)
    app.state.clock = clock
    seen = []
    for _ in range(60):
        r = _http_beat(client, tok, clock.now)
        assert r.status_code == 200
        seen.append(r.json()["next_heartbeat_s"])
        clock.advance(60)
    assert all(isinstance(v, int) and 54 <= v <= 66 for v in seen), seen
    assert len(set(seen)) >= 5  # spread, not one constant


def test_jitter_is_uniform_over_the_band(session: Session, device, plain_settings: Settings) -> None:  # type: ignore[no-untyped-def]
    dev, _ = device
    rng = random.Random(2026)
    got = [record_with(session, dev, plain_settings, T0 + 60 * i * S, rng) for i in range(400)]
    assert min(got) == 54 and max(got) == 66
    assert 58.5 < sum(got) / len(got) < 61.5  # centred on the interval
    assert len(set(got)) == 13


def record_with(
    session: Session, dev: Device, settings: Settings, now: dt.datetime, rng: random.Random
) -> int:
    return service.record_heartbeat(
        session, device=dev, settings=settings, now=now, rng=rng, beat=beat(sent_at=now)
    )[1]


# --- strict body ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("headers", "code"),
    [
        ({}, "missing_token"),
        ({"Authorization": "Token abc"}, "missing_token"),
        ({"Authorization": "Bearer thd_nobody"}, "invalid_token"),
    ],
)
@pytest.mark.parametrize("body", [b"", b"not json", b'{"listening": "yes"}', b"x" * 20000])
def test_401_comes_before_any_body_error(headers: dict[str, str], code: str, body: bytes, client) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/api/v1/heartbeats", content=body, headers={"Content-Type": "application/json", **headers}
    )
    assert r.status_code == 401
    assert r.json()["error"]["code"] == code
    assert r.headers["www-authenticate"].startswith("Bearer")
    assert client.get("/api/v1/health").status_code == 200


def test_revoked_device_heartbeat_is_403(client, session: Session, device) -> None:  # type: ignore[no-untyped-def]
    dev, tok = device
    service.revoke_device(session, dev.serial)
    session.flush()
    r = _http_beat(client, tok, dt.datetime.now(dt.UTC))
    assert r.status_code == 403 and r.json()["error"]["code"] == "device_revoked"
    assert segments(session, dev) == []


NOW = T0
BAD_BODIES: dict[str, bytes] = {
    "empty": b"",
    "not_json": b"listening",
    "array": b"[]",
    "listening_string": json.dumps(
        {"sent_at": NOW.isoformat(), "listening": "true", "firmware": "1"}
    ).encode(),
    "listening_number": json.dumps({"sent_at": NOW.isoformat(), "listening": 1, "firmware": "1"}).encode(),
    "listening_missing": json.dumps({"sent_at": NOW.isoformat(), "firmware": "1"}).encode(),
    "sent_at_epoch_number": json.dumps({"sent_at": 1772438400, "listening": True, "firmware": "1"}).encode(),
    "sent_at_epoch_string": json.dumps(
        {"sent_at": "1772438400", "listening": True, "firmware": "1"}
    ).encode(),
    "sent_at_no_offset": json.dumps(
        {"sent_at": "2026-03-02T08:00:00", "listening": True, "firmware": "1"}
    ).encode(),
    "sent_at_401_days_ago": json.dumps(
        {"sent_at": (NOW - dt.timedelta(days=400, seconds=1)).isoformat(), "listening": True, "firmware": "1"}
    ).encode(),
    "sent_at_25_hours_ahead": json.dumps(
        {"sent_at": (NOW + dt.timedelta(hours=24, seconds=1)).isoformat(), "listening": True, "firmware": "1"}
    ).encode(),
    "sent_at_nan": b'{"sent_at": NaN, "listening": true, "firmware": "1"}',
    "firmware_missing": json.dumps({"sent_at": NOW.isoformat(), "listening": True}).encode(),
    "firmware_empty": json.dumps({"sent_at": NOW.isoformat(), "listening": True, "firmware": ""}).encode(),
    "firmware_65_chars": json.dumps(
        {"sent_at": NOW.isoformat(), "listening": True, "firmware": "f" * 65}
    ).encode(),
    "firmware_number": json.dumps({"sent_at": NOW.isoformat(), "listening": True, "firmware": 3}).encode(),
    "firmware_nul": json.dumps(
        {"sent_at": NOW.isoformat(), "listening": True, "firmware": "3\u0000"}
    ).encode(),
    "firmware_newline": json.dumps(
        {"sent_at": NOW.isoformat(), "listening": True, "firmware": "3\n1"}
    ).encode(),
    "too_large": json.dumps(
        {"sent_at": NOW.isoformat(), "listening": True, "firmware": "1", "pad": "x" * 20000}
    ).encode(),
}


@pytest.mark.parametrize("name", sorted(BAD_BODIES))
def test_bad_heartbeat_body_is_422(name: str, app, client, session: Session, device) -> None:  # type: ignore[no-untyped-def]
    dev, tok = device
    app.state.clock = Clock(NOW)
    r = client.post(
        "/api/v1/heartbeats",
        content=BAD_BODIES[name],
        headers={"Authorization": f"Bearer {tok}", "Content-Type": "application/json"},
    )
    assert r.status_code == 422, r.text
    err = r.json()["error"]
    assert err["code"] == "invalid_request" and err["message"]
    assert client.get("/api/v1/health").status_code == 200
    assert segments(session, dev) == []
    session.refresh(dev)
    assert dev.last_seen_at is None


def test_window_edges_and_unknown_fields_are_accepted(app, client, session: Session, device) -> None:  # type: ignore[no-untyped-def]
    dev, tok = device
    app.state.clock = Clock(NOW)
    for sent in (NOW - dt.timedelta(days=400), NOW + dt.timedelta(hours=24)):
        r = _http_beat(client, tok, sent, battery=0.8, rssi_dbm=-61)
        assert r.status_code == 200, r.text
    assert session.get(Device, dev.id).clock_skew_s == pytest.approx(24 * 3600.0)  # type: ignore[union-attr]


# --- alerts known to lie inside listening time (Alert.within_listening) -------------------------------


def _flags(
    session: Session, alerts: list[Any], device: Device
) -> tuple[list[bool | None], dt.datetime | None]:
    session.expire_all()
    return [session.get(type(a), a.id).within_listening for a in alerts], session.get(
        Device, device.id
    ).listening_check_from


def test_alert_after_the_last_beat_is_marked_by_the_next_beat(
    session: Session,
    device,
    store,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    for k in range(3):
        service.record_heartbeat(
            session,
            device=dev,
            beat=beat(sent_at=T0 + 60 * k * S),
            settings=plain_settings,
            now=T0 + 60 * k * S,
        )
    inside = factories.make_alert(
        session, store, plain_settings, dev, detected_at=T0 + 30 * S, now=T0 + 125 * S
    )
    after = factories.make_alert(
        session, store, plain_settings, dev, detected_at=T0 + 150 * S, now=T0 + 151 * S
    )
    # Detected before the last beat: inside a stored segment at once. After it: not known yet.
    assert _flags(session, [inside, after], dev) == ([True, None], T0 + 150 * S)
    service.record_heartbeat(
        session, device=dev, beat=beat(sent_at=T0 + 180 * S), settings=plain_settings, now=T0 + 180 * S
    )
    assert _flags(session, [inside, after], dev) == ([True, True], None)


def test_alert_in_a_gap_stays_unmarked_and_the_device_is_cleared(
    session: Session,
    device,
    store,  # type: ignore[no-untyped-def]
    plain_settings: Settings,
) -> None:
    dev, _ = device
    service.record_heartbeat(session, device=dev, beat=beat(sent_at=T0), settings=plain_settings, now=T0)
    gap_alert = factories.make_alert(
        session, store, plain_settings, dev, detected_at=T0 + 200 * S, now=T0 + 201 * S
    )
    assert _flags(session, [gap_alert], dev) == ([None], T0 + 200 * S)
    # Ten minutes of silence: the next beat opens a new segment, so the alert's time stays offline.
    service.record_heartbeat(
        session, device=dev, beat=beat(sent_at=T0 + 600 * S), settings=plain_settings, now=T0 + 600 * S
    )
    assert _flags(session, [gap_alert], dev) == ([None], None)
    assert [s[:2] for s in segments(session, dev)] == [(T0, T0), (T0 + 600 * S, T0 + 600 * S)]
