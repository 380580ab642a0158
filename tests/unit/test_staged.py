"""Matching alerts to staged test events, and detection figures."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from server.analytics import staged

T0 = pd.Timestamp("2026-11-24 10:00:00", tz="UTC")


def _events(*rows):
    return pd.DataFrame(
        [
            {
                "staged_event_id": i,
                "home_id": h,
                "sound_class": c,
                "started_at": T0 + pd.Timedelta(seconds=s),
                "ended_at": T0 + pd.Timedelta(seconds=e),
                "source": "test tone, hallway",
            }
            for i, h, c, s, e in rows
        ]
    )


def _alerts(*rows):
    return pd.DataFrame(
        [
            {
                "alert_id": i,
                "device_id": d,
                "sound_class": c,
                "detected_at": T0 + pd.Timedelta(seconds=s),
                "score": sc,
            }
            for i, d, c, s, sc in rows
        ]
    )


INSTALLS = pd.DataFrame(
    {
        "device_id": [1, 2, 3],
        "home_id": [10, 10, 20],
        "installed_at": [T0 - pd.Timedelta(days=30)] * 3,
        "removed_at": [pd.NaT] * 3,
    }
)


def test_window_edges_are_inclusive_at_the_tolerance():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    al = _alerts(
        (100, 1, "smoke_alarm", -30.0, 0.9),  # exactly start - 30 s: matched
        (101, 1, "smoke_alarm", -30.5, 0.9),  # just before: not matched
        (102, 1, "smoke_alarm", 90.0, 0.8),  # exactly end + 30 s: matched
        (103, 1, "smoke_alarm", 90.5, 0.8),  # just after: not matched
    )
    m = staged.match(ev, al, INSTALLS)
    assert sorted(m.matches["alert_id"]) == [100, 102]
    row = m.events.iloc[0]
    assert bool(row.detected) and row.alert_id == 100
    assert row.latency_s == pytest.approx(-30.0)  # alert before the logged start: negative latency


def test_custom_tolerance():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    al = _alerts((100, 1, "smoke_alarm", 75.0, 0.9))
    assert staged.match(ev, al, INSTALLS, tolerance_s=10).matches.empty
    assert len(staged.match(ev, al, INSTALLS, tolerance_s=15).matches) == 1


def test_other_class_during_event_is_not_a_detection():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    al = _alerts((100, 1, "baby_cry", 20.0, 0.95))
    m = staged.match(ev, al, INSTALLS)
    assert m.matches.empty  # stays a false alarm (or its verdict) for its own class
    assert not bool(m.events.iloc[0].detected)
    assert math.isnan(m.events.iloc[0].latency_s)


def test_two_devices_in_one_home_both_detect_first_gives_latency():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    al = _alerts((100, 2, "smoke_alarm", 12.0, 0.7), (101, 1, "smoke_alarm", 4.0, 0.6))
    m = staged.match(ev, al, INSTALLS)
    assert sorted(m.matches["alert_id"]) == [100, 101]
    row = m.events.iloc[0]
    assert row.alert_id == 101 and row.latency_s == pytest.approx(4.0)
    assert row.best_score == pytest.approx(0.7)


def test_device_in_another_home_or_not_yet_installed_does_not_detect():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    installs = pd.concat(
        [
            INSTALLS,
            pd.DataFrame(
                {
                    "device_id": [4],
                    "home_id": [10],
                    "installed_at": [T0 + pd.Timedelta(seconds=30)],
                    "removed_at": [pd.NaT],
                }
            ),
        ],
        ignore_index=True,
    )
    al = _alerts(
        (100, 3, "smoke_alarm", 10.0, 0.9),  # device 3 is in home 20
        (101, 4, "smoke_alarm", 10.0, 0.9),  # device 4 installed 20 s later
        (102, 4, "smoke_alarm", 40.0, 0.9),
    )  # ...and detects once installed
    m = staged.match(ev, al, installs)
    assert m.matches["alert_id"].tolist() == [102]


def test_removed_device_does_not_detect():
    ev = _events((1, 10, "smoke_alarm", 0, 60))
    installs = INSTALLS.assign(removed_at=[T0 + pd.Timedelta(seconds=5), pd.NaT, pd.NaT])
    al = _alerts((100, 1, "smoke_alarm", 10.0, 0.9))
    assert staged.match(ev, al, installs).matches.empty


def test_alert_inside_two_overlapping_events_is_matched_once():
    ev = _events((1, 10, "smoke_alarm", 0, 60), (2, 10, "smoke_alarm", 50, 120))
    al = _alerts((100, 1, "smoke_alarm", 55.0, 0.9))
    m = staged.match(ev, al, INSTALLS)
    assert m.matches.to_dict("records") == [{"alert_id": 100, "staged_event_id": 1}]
    assert m.events["detected"].tolist() == [True, True]


def test_detection_summary():
    rows = [(i, 10, "smoke_alarm", 1000 * i, 1000 * i + 60) for i in range(1, 11)]
    ev = _events(*rows)
    # Events 1..7 detected with latencies 1..7 s; 8..10 missed.
    al = _alerts(*[(100 + i, 1, "smoke_alarm", 1000 * i + i, 0.9) for i in range(1, 8)])
    d = staged.detection(staged.match(ev, al, INSTALLS).events)
    assert (d.events, d.detected) == (10, 7)
    assert d.share.estimate == pytest.approx(0.7) and d.share.method == "wilson"
    assert d.share_exact.method == "clopper-pearson"
    assert d.latency_median_s == pytest.approx(4.0)
    assert d.latency_p90_s == pytest.approx(np.quantile(np.arange(1, 8), 0.9))
    assert d.missed["staged_event_id"].tolist() == [8, 9, 10]


def test_detection_with_no_events():
    no_events = pd.DataFrame(
        columns=["staged_event_id", "home_id", "sound_class", "started_at", "ended_at", "source"]
    )
    no_alerts = pd.DataFrame(columns=["alert_id", "device_id", "sound_class", "detected_at", "score"])
    m = staged.match(no_events, no_alerts, INSTALLS)
    d = staged.detection(m.events)
    assert m.matches.empty
    assert d.events == 0 and d.share.reason == "no_trials" and math.isnan(d.latency_median_s)
