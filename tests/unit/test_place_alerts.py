"""Placing alerts in monitored windows and local weeks (`load.place_alerts`, pure; no database)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from server.analytics import trend
from server.analytics.load import place_alerts

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
    out = place_alerts(facts, pd.DataFrame(columns=["window_id", "device_id", "started_at", "ended_at"]),
                       steps, after)
    assert out["week_index"].tolist() == [before.index, after.index, before.index]
    assert out["period"].tolist() == ["before", "week", "before"]
    assert not out["counted"].any()


def test_no_alerts_gives_empty_columns() -> None:
    week = trend.week("2026-W10", TZ)
    facts = pd.DataFrame({"device_id": np.array([], dtype=np.int64), "t": np.array([], dtype=np.float64),
                          "listening": np.array([], dtype=np.int64), "score": np.array([], dtype=np.float64)})
    out = place_alerts(facts, pd.DataFrame(columns=["window_id", "device_id", "started_at", "ended_at"]),
                       trend.utc_offset_steps(TZ, week.start_at, week.end_at), week)
    assert len(out) == 0 and {"window_id", "counted", "week_index", "period", "score_milli"} <= set(out)
