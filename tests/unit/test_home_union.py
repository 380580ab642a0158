"""A home's monitored time is the union of its devices' listening, split into weeks."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from server.analytics import exposure, trend

UTC = "UTC"
DAY = 86400.0


def ts(*days: float) -> pd.Series:
    return pd.Series(pd.to_datetime(np.array(days) * DAY, unit="s", utc=True))


def test_overlapping_homes_are_those_whose_devices_listened_at_once() -> None:
    windows = pd.DataFrame(
        {
            "home_id": [1, 1, 2, 2, 3],
            # Home 1: two devices over the same days; home 2: one device after the other.
            "started_at": ts(0, 3, 0, 5, 0),
            "ended_at": ts(10, 4, 5, 9, 9),
        }
    )
    assert exposure.overlapping_homes(windows).tolist() == [1]
    assert exposure.overlapping_homes(windows.iloc[:0]).tolist() == []


def test_merge_intervals_per_home() -> None:
    out = exposure.merge_intervals([1, 1, 1, 2, 1], [0, 5, 20, 0, 8], [10, 12, 30, 5, 9])
    assert out.values.tolist() == [[1, 0, 12], [1, 20, 30], [2, 0, 5]]
    # Empty intervals drop out; touching ones merge.
    out = exposure.merge_intervals([1, 1, 1], [0, 10, 4], [10, 20, 4])
    assert out.values.tolist() == [[1, 0, 20]]


def test_union_over_weeks_splits_at_week_starts() -> None:
    # Week index of 2026-09-28 (a Monday) in UTC.
    k = int(trend.week_index(pd.Series(pd.to_datetime(["2026-09-28"], utc=True)), UTC)[0])
    w0 = float(trend.week_start_s([k], UTC)[0])
    merged = pd.DataFrame({"home_id": [4], "start_s": [w0 - DAY], "end_s": [w0 + 2 * DAY]})
    out = exposure.union_over_buckets(merged, lambda b: trend.week_start_s(b, UTC), (k - 1, k))
    got = {int(b): s for b, s in zip(out["bucket"], out["seconds"], strict=True)}
    assert got == {k - 1: pytest.approx(DAY), k: pytest.approx(2 * DAY)}


def test_home_monitored_takes_the_union_only_where_windows_overlap() -> None:
    windows = pd.DataFrame({"window_id": [0, 1, 2], "home_id": [1, 1, 2]})
    by_bucket = pd.DataFrame({"window_id": [0, 1, 2], "bucket": [5, 5, 5], "seconds": [100.0, 80.0, 50.0]})
    union = pd.DataFrame({"home_id": [1], "bucket": [5], "seconds": [120.0]})
    out = exposure.home_monitored(by_bucket, windows, union, [1])
    assert out.values.tolist() == [[1, 5, 120.0], [2, 5, 50.0]]
    # Without overlap the home's time is the sum of its windows'.
    out = exposure.home_monitored(by_bucket, windows, union.iloc[:0], [])
    assert out.values.tolist() == [[1, 5, 180.0], [2, 5, 50.0]]
