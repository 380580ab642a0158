"""Placing alerts in monitored windows and local weeks (`load.place_alerts`), and picking the ones
near staged events (`load.staged_candidates`); pure, no database."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from server.analytics import trend
from server.analytics.load import place_alerts, staged_candidates

UTC = dt.UTC
TZ = "Europe/London"


def _ts(*args: int) -> pd.Timestamp:
    return pd.Timestamp(dt.datetime(*args, tzinfo=UTC))


def _epoch(*args: int) -> float:
    return dt.datetime(*args, tzinfo=UTC).timestamp()


def test_window_edges_devices_and_listening() -> None:
    windows = pd.DataFrame(
        {
            "window_id": [0, 1, 2],
            "device_id": [7, 7, 8],
            "started_at": [_ts(2026, 3, 2), _ts(2026, 3, 4), _ts(2026, 3, 2)],
            "ended_at": [_ts(2026, 3, 3), _ts(2026, 3, 5), _ts(2026, 3, 5)],
        }
    )
    facts = pd.DataFrame(
        {
            "device_id": [7, 7, 7, 7, 8, 9],
            "t": [
                _epoch(2026, 3, 2),  # at a window's start: inside
                _epoch(2026, 3, 3),  # at its end: outside (windows are half-open)
                _epoch(2026, 3, 4, 12),  # the device's second window
                _epoch(2026, 3, 2, 6),  # inside, but the device was not listening
                _epoch(2026, 3, 3, 6),  # another device's window
                _epoch(2026, 3, 3, 6),  # a device with no window at all
            ],
            "listening": [1, 1, 1, 0, 1, 1],
            "score": [0.57, 0.9, 0.9, 0.9, 0.9, 0.9],
        }
    )
    week = trend.week("2026-W10", TZ)
    out = place_alerts(facts, windows, trend.utc_offset_steps(TZ, week.start_at, week.end_at), week)
    assert out["window_id"].tolist() == [0, -1, 1, 0, 2, -1]
    assert out["counted"].tolist() == [True, False, True, False, True, False]
    assert set(out["period"]) == {"week"} and set(out["week_index"]) == {week.index}
    # 0.57 is 569.999... in binary; it still belongs to the 570 bucket.
    assert out["score_milli"].tolist() == [570, 900, 900, 900, 900, 900]


def test_local_weeks_follow_the_clock_change() -> None:
    # London moves to UTC+1 at 01:00 UTC on Sunday 29 March 2026 (from memory of the EU rule: last
    # Sunday of March); local Monday 30 March 00:00 is Sunday 23:00 UTC.
    before = trend.week("2026-W13", TZ)
    after = trend.week("2026-W14", TZ)
    assert after.start_at == dt.datetime(2026, 3, 29, 23, 0, tzinfo=UTC)
    t = np.array([after.start_at.timestamp() - 1e-3, after.start_at.timestamp(), _epoch(2026, 3, 29, 0, 30)])
    facts = pd.DataFrame({"device_id": [1, 1, 1], "t": t, "listening": [1, 1, 1], "score": [0.9] * 3})
    steps = trend.utc_offset_steps(TZ, before.start_at, after.end_at)
    out = place_alerts(
        facts, pd.DataFrame(columns=["window_id", "device_id", "started_at", "ended_at"]), steps, after
    )
    assert out["week_index"].tolist() == [before.index, after.index, before.index]
    assert out["period"].tolist() == ["before", "week", "before"]
    assert not out["counted"].any()


def test_no_alerts_gives_empty_columns() -> None:
    week = trend.week("2026-W10", TZ)
    facts = pd.DataFrame(
        {
            "device_id": np.array([], dtype=np.int64),
            "t": np.array([], dtype=np.float64),
            "listening": np.array([], dtype=np.int64),
            "score": np.array([], dtype=np.float64),
        }
    )
    out = place_alerts(
        facts,
        pd.DataFrame(columns=["window_id", "device_id", "started_at", "ended_at"]),
        trend.utc_offset_steps(TZ, week.start_at, week.end_at),
        week,
    )
    assert len(out) == 0 and {"window_id", "counted", "week_index", "period", "score_milli"} <= set(out)


def test_staged_candidates_need_class_home_and_time() -> None:
    events = pd.DataFrame(
        {
            "home_id": [1, 1, 2],
            "sound_class": ["smoke_alarm", "smoke_alarm", "glass_break"],
            # The first two overlap, so their spans join into one stretch.
            "started_at": [_ts(2026, 3, 2, 10), _ts(2026, 3, 2, 10, 1), _ts(2026, 3, 2, 10)],
            "ended_at": [_ts(2026, 3, 2, 10, 2), _ts(2026, 3, 2, 10, 3), _ts(2026, 3, 2, 10, 1)],
        }
    )
    # Devices 7 and 8 in home 1 (two devices in one home), device 9 in home 2; 8 also once in 2.
    installations = pd.DataFrame({"device_id": [7, 8, 9, 8], "home_id": [1, 1, 2, 2]})
    margin = 31.0
    start = _epoch(2026, 3, 2, 10)
    facts = pd.DataFrame(
        {
            "device_id": [7, 8, 7, 7, 9, 9, 7, 8, 8],
            "sound_class": pd.Categorical(
                [
                    "smoke_alarm",  # 0: inside the first event
                    "smoke_alarm",  # 1: the home's other device, inside the second
                    "smoke_alarm",  # 2: exactly `margin` before the first event: in
                    "smoke_alarm",  # 3: just beyond the margin after the second event: out
                    "smoke_alarm",  # 4: home 2's device, but home 2's event is glass_break: out
                    "glass_break",  # 5: home 2's event, its class: in
                    "glass_break",  # 6: home 1's device during home 2's event: out
                    "glass_break",  # 7: device 8, once installed in home 2: in
                    "baby_cry",  # 8: a class no event has: out
                ]
            ),
            "t": [
                start + 60,
                start + 150,
                start - margin,
                start + 180 + margin + 0.001,
                start + 30,
                start + 30,
                start + 30,
                start + 90,
                start + 30,
            ],
        }
    )
    rows = staged_candidates(facts, events, installations, margin_s=margin)
    assert rows.tolist() == [0, 1, 2, 5, 7]


def test_staged_candidates_with_nothing_to_match() -> None:
    facts = pd.DataFrame({"device_id": [7], "sound_class": ["smoke_alarm"], "t": [_epoch(2026, 3, 2)]})
    no_events = pd.DataFrame(
        {
            "home_id": [],
            "sound_class": [],
            "started_at": pd.to_datetime([], utc=True),
            "ended_at": pd.to_datetime([], utc=True),
        }
    )
    installations = pd.DataFrame({"device_id": [7], "home_id": [1]})
    assert staged_candidates(facts, no_events, installations, margin_s=31.0).tolist() == []
    far = pd.DataFrame(
        {
            "home_id": [1],
            "sound_class": ["smoke_alarm"],
            "started_at": [_ts(2026, 4, 1)],
            "ended_at": [_ts(2026, 4, 1, 0, 1)],
        }
    )
    assert staged_candidates(facts, far, installations, margin_s=31.0).tolist() == []
