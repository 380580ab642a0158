"""Monitored windows, splitting listening into weeks, and ISO weeks in a trial's time zone."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from server.analytics import exposure, rates, trend

UTC = dt.UTC


def ts(s: str) -> pd.Timestamp:
    return pd.Timestamp(s, tz="UTC")


def changes(*rows):
    return pd.DataFrame(
        [{"home_id": h, "at": ts(a), "to_state": s, "listening": lis} for h, a, s, lis in rows]
    )


def installs(*rows):
    return pd.DataFrame(
        [
            {
                "installation_id": i,
                "device_id": d,
                "home_id": h,
                "room": r,
                "installed_at": ts(a),
                "removed_at": ts(b) if b else pd.NaT,
            }
            for i, d, h, r, a, b in rows
        ]
    )


END = ts("2026-12-31")


def test_home_intervals_follow_monitored_states():
    c = changes(
        (1, "2026-11-01", "consented", True),
        (1, "2026-11-02", "installed", True),
        (1, "2026-11-03", "active", True),
        (1, "2026-11-10", "paused", False),  # paused and not listening: not monitored
        (1, "2026-11-12", "active", True),
        (1, "2026-11-15", "paused", True),  # paused but still listening: monitored
        (1, "2026-11-18", "withdrawn", True),  # withdrawn mid-month
    )
    out = exposure.home_intervals(c, until=END)
    assert out[["started_at", "ended_at"]].values.tolist() == [
        [ts("2026-11-02"), ts("2026-11-10")],
        [ts("2026-11-12"), ts("2026-11-18")],
    ]


def test_open_state_runs_until_the_report_end():
    out = exposure.home_intervals(changes((2, "2026-11-05", "active", True)), until=END)
    assert out.iloc[0].ended_at == END


def test_device_moved_mid_week_gives_one_window_per_home():
    inst = installs(
        (1, 7, 1, "kitchen", "2026-11-01", "2026-11-25 12:00"), (2, 7, 2, "hallway", "2026-11-25 15:00", None)
    )
    hi = exposure.home_intervals(
        changes((1, "2026-10-01", "active", True), (2, "2026-10-01", "active", True)), until=END
    )
    w = exposure.monitored_windows(inst, hi, start=ts("2026-11-23"), end=ts("2026-11-30"))
    assert w[["home_id", "room", "started_at", "ended_at"]].values.tolist() == [
        [1, "kitchen", ts("2026-11-23"), ts("2026-11-25 12:00")],
        [2, "hallway", ts("2026-11-25 15:00"), ts("2026-11-30")],
    ]
    assert w["window_id"].tolist() == [0, 1]


def test_overlapping_installations_of_one_device_do_not_count_twice():
    # The first installation was never closed when the device moved.
    inst = installs((1, 7, 1, "kitchen", "2026-11-01", None), (2, 7, 2, "hallway", "2026-11-20", None))
    hi = exposure.home_intervals(
        changes((1, "2026-10-01", "active", True), (2, "2026-10-01", "active", True)), until=END
    )
    w = exposure.monitored_windows(inst, hi, start=ts("2026-11-01"), end=ts("2026-12-01"))
    assert w["ended_at"].iloc[0] == ts("2026-11-20") and w["started_at"].iloc[1] == ts("2026-11-20")


def test_withdrawn_home_window_ends_at_withdrawal():
    inst = installs((1, 7, 1, "kitchen", "2026-11-01", None))
    hi = exposure.home_intervals(
        changes((1, "2026-11-01", "active", True), (1, "2026-11-16", "withdrawn", True)), until=END
    )
    w = exposure.monitored_windows(inst, hi, start=ts("2026-11-01"), end=ts("2026-12-01"))
    assert w[["started_at", "ended_at"]].values.tolist() == [[ts("2026-11-01"), ts("2026-11-16")]]


def test_home_never_monitored_has_no_window():
    inst = installs((1, 7, 1, "kitchen", "2026-11-01", None))
    hi = exposure.home_intervals(changes((1, "2026-11-01", "consented", True)), until=END)
    assert exposure.monitored_windows(inst, hi, start=ts("2026-11-01"), end=ts("2026-12-01")).empty


def _brute_week_seconds(pieces, tz):
    """Split each piece second by second boundary-wise with pandas, for comparison."""
    out = {}
    for wid, a, b in pieces:
        ka, kb = trend.week_index(pd.Series([a]), tz)[0], trend.week_index(pd.Series([b]), tz)[0]
        for k in range(ka, kb + 1):
            ws, we = trend.week_start_s([k, k + 1], tz)
            lo, hi = max(a.timestamp(), ws), min(b.timestamp(), we)
            if hi > lo:
                out[(wid, k)] = out.get((wid, k), 0.0) + hi - lo
    return out


@pytest.mark.parametrize("tz", ["UTC", "Europe/London", "America/New_York", "Australia/Adelaide"])
def test_spread_over_weeks_is_exact_across_boundaries_and_dst(tz):
    rng = np.random.default_rng(1)
    base = ts("2026-03-01").value / 1e9
    pieces = []
    for wid in range(3):
        for _ in range(40):
            a = base + rng.uniform(0, 80 * 86400)
            b = a + rng.choice([rng.uniform(1, 3600), rng.uniform(3600, 20 * 86400)])
            pieces.append((wid, pd.Timestamp(a, unit="s", tz="UTC"), pd.Timestamp(b, unit="s", tz="UTC")))
    frame = pd.DataFrame(pieces, columns=["window_id", "a", "b"])
    frame["first_bucket"] = trend.week_index(frame["a"], tz)
    frame["last_bucket"] = trend.week_index(frame["b"], tz)
    frame["start_s"] = trend.epoch_s(frame["a"])
    frame["end_s"] = trend.epoch_s(frame["b"])
    grouped = frame.groupby(["window_id", "first_bucket", "last_bucket"], as_index=False).agg(
        pieces=("a", "size"), sum_start_s=("start_s", "sum"), sum_end_s=("end_s", "sum")
    )
    got = exposure.spread_over_buckets(grouped, lambda k: trend.week_start_s(k, tz))
    want = _brute_week_seconds(pieces, tz)
    got_d = {(int(r.window_id), int(r.bucket)): r.seconds for r in got.itertuples() if r.seconds > 1e-6}
    assert got_d.keys() == want.keys()
    for key, v in want.items():
        assert got_d[key] == pytest.approx(v, abs=1e-3)
    # The total is the plain sum of piece lengths.
    assert got["seconds"].sum() == pytest.approx((frame["end_s"] - frame["start_s"]).sum(), rel=1e-12)


def test_monitored_time_keeps_windows_without_listening_as_zero():
    windows = pd.DataFrame({"window_id": [0, 1], "home_id": [1, 2], "room": ["kitchen", "hallway"]})
    by_bucket = pd.DataFrame(
        {"window_id": [0, 0], "bucket": [2900, 2901], "seconds": [rates.HOME_MONTH_S, 60.0]}
    )
    per_home = exposure.monitored_time(by_bucket, windows, by=["home_id"])
    assert per_home["seconds"].tolist() == [rates.HOME_MONTH_S + 60.0, 0.0]
    assert per_home["home_months"].iloc[0] == pytest.approx(1 + 60.0 / rates.HOME_MONTH_S)
    week = exposure.monitored_time(by_bucket, windows, by=["home_id"], buckets=[2901])
    assert week["seconds"].tolist() == [60.0, 0.0]
    total = exposure.monitored_time(by_bucket.iloc[0:0], windows, by=[])
    assert total["seconds"].tolist() == [0.0]
    assert rates.poisson_rate(2, float(total["home_months"].iloc[0])).reason == rates.NO_MONITORED_TIME


def test_home_month_is_365_25_over_12_days():
    # Common practice in this trade: a home-month is 30.4375 days of monitored time.
    assert rates.HOME_MONTH_DAYS == 30.4375
    assert rates.HOME_MONTH_S == 2_629_800.0


# ---------------------------------------------------------------------------------------
# ISO weeks


def test_iso_week_in_a_time_zone():
    w = trend.week("2026-W48", "Europe/London")
    assert w.starts_on == dt.date(2026, 11, 23)
    assert w.start_at == dt.datetime(2026, 11, 23, tzinfo=UTC)
    ny = trend.week("2026-W48", "America/New_York")
    assert ny.start_at == dt.datetime(2026, 11, 23, 5, tzinfo=UTC)
    assert ny.end_at - ny.start_at == dt.timedelta(days=7)
    # The week that holds the spring-forward change is an hour short.
    spring = trend.week("2026-W10", "America/New_York")  # clocks go forward on Sunday 8 March
    assert spring.end_at - spring.start_at == dt.timedelta(days=7, hours=-1)


def test_week_labels_round_trip_and_bad_labels_are_refused():
    for label in ("2026-W01", "2026-W53", "2027-W01", "2020-W53"):
        assert trend.week(label, "UTC").label == label
    for bad in ("2026-48", "2026-W54", "2025-W53", "W48"):
        with pytest.raises(ValueError):
            trend.parse_week(bad)


def test_last_complete_week():
    now = dt.datetime(2026, 12, 1, 9, tzinfo=UTC)  # a Tuesday in 2026-W49
    assert trend.last_complete_week(now, "UTC").label == "2026-W48"
    # Monday 00:30 in Auckland is still Sunday in UTC: the local week decides.
    sunday_utc = dt.datetime(2026, 11, 29, 11, 30, tzinfo=UTC)
    assert trend.last_complete_week(sunday_utc, "Pacific/Auckland").label == "2026-W48"
    assert trend.last_complete_week(sunday_utc, "UTC").label == "2026-W47"


def test_week_index_agrees_with_week_start():
    tz = "Europe/Berlin"
    w = trend.week("2026-W13", tz)  # holds the spring-forward change
    inside = pd.Series([pd.Timestamp(w.start_at), pd.Timestamp(w.end_at) - pd.Timedelta(microseconds=1)])
    assert trend.week_index(inside, tz).tolist() == [w.index, w.index]
    assert trend.week_start_s([w.index], tz)[0] == pytest.approx(w.start_at.timestamp())


def test_utc_offset_steps_for_a_zone_with_daylight_saving():
    steps = trend.utc_offset_steps(
        "Europe/London", dt.datetime(2026, 1, 1, tzinfo=UTC), dt.datetime(2027, 1, 1, tzinfo=UTC)
    )
    assert [s.offset_s for s in steps] == [0.0, 3600.0, 0.0]
    assert steps[1].from_s == dt.datetime(2026, 3, 29, 1, tzinfo=UTC).timestamp()
    assert steps[2].from_s == dt.datetime(2026, 10, 25, 1, tzinfo=UTC).timestamp()
    assert [
        s.offset_s
        for s in trend.utc_offset_steps(
            "UTC", dt.datetime(2026, 1, 1, tzinfo=UTC), dt.datetime(2027, 1, 1, tzinfo=UTC)
        )
    ] == [0.0]


def test_weekly_rates_fill_missing_weeks():
    w = trend.week("2026-W46", "UTC").index
    weeks = pd.DataFrame({"week_index": [w, w + 2], "false_alarms": [3, 0], "home_months": [6.0, 2.0]})
    out = trend.weekly_rates(weeks, first_index=w, last_index=w + 2, tz="UTC")
    assert out["week"].tolist() == ["2026-W46", "2026-W47", "2026-W48"]
    assert out["rate"].iloc[0] == pytest.approx(0.5)
    assert out["reason"].tolist() == [None, rates.NO_MONITORED_TIME, None]
    assert out["high"].iloc[2] == pytest.approx(3.688879 / 2.0, abs=1e-6)


# --- windows cut where the reported firmware changed ---------------------------------------------


def _windows(*rows):
    return pd.DataFrame(
        [
            {
                "window_id": k,
                "installation_id": 10 + k,
                "device_id": d,
                "home_id": h,
                "room": "hall",
                "started_at": ts(a),
                "ended_at": ts(b),
            }
            for k, (d, h, a, b) in enumerate(rows)
        ]
    )


def _reports(*rows):
    return pd.DataFrame(
        {
            "device_id": pd.Series([d for d, _, _ in rows], dtype=np.int64),
            "at": pd.Series([ts(a) for _, a, _ in rows], dtype="datetime64[ns, UTC]"),
            "firmware": pd.Series([f for _, _, f in rows], dtype=object),
        }
    )


def _cut(windows, reports, current):
    out = exposure.split_by_firmware(windows, reports, pd.Series(current))
    return [
        (
            int(r.window_id),
            int(r.device_id),
            int(r.home_id),
            r.started_at.isoformat(),
            r.ended_at.isoformat(),
            r.firmware,
        )
        for r in out.itertuples()
    ]


def test_an_upgrade_inside_a_window_cuts_it_in_two():
    windows = _windows((7, 1, "2026-03-01", "2026-03-31"), (8, 2, "2026-03-01", "2026-03-31"))
    reports = _reports(
        (7, "2026-02-20", "4.1.0"),
        (7, "2026-03-10 12:00", "4.2.0"),
        (7, "2026-03-12", "4.2.0"),  # a repeat changes nothing
        (8, "2026-03-01", "4.1.0"),  # exactly at the window's start: no cut
    )
    assert _cut(windows, reports, {7: "4.2.0", 8: "4.1.0"}) == [
        (0, 7, 1, "2026-03-01T00:00:00+00:00", "2026-03-10T12:00:00+00:00", "4.1.0"),
        (1, 7, 1, "2026-03-10T12:00:00+00:00", "2026-03-31T00:00:00+00:00", "4.2.0"),
        (2, 8, 2, "2026-03-01T00:00:00+00:00", "2026-03-31T00:00:00+00:00", "4.1.0"),
    ]


def test_firmware_before_the_first_report_and_without_any():
    windows = _windows(
        (7, 1, "2026-03-01", "2026-03-05"),  # before device 7's first report
        (7, 2, "2026-03-06", "2026-03-09"),  # the device moved; a roll-back cuts this window
        (8, 3, "2026-03-01", "2026-03-09"),  # device 8 never reported: its current firmware
        (9, 4, "2026-03-01", "2026-03-09"),  # nor did 9, whose firmware is not known at all
    )
    reports = _reports((7, "2026-03-03", "4.2.0"), (7, "2026-03-07", "4.1.0"))
    assert _cut(windows, reports, {7: "4.1.0", 8: "3.9.9", 9: None}) == [
        (0, 7, 1, "2026-03-01T00:00:00+00:00", "2026-03-05T00:00:00+00:00", "4.2.0"),
        (1, 7, 2, "2026-03-06T00:00:00+00:00", "2026-03-07T00:00:00+00:00", "4.2.0"),
        (2, 7, 2, "2026-03-07T00:00:00+00:00", "2026-03-09T00:00:00+00:00", "4.1.0"),
        (3, 8, 3, "2026-03-01T00:00:00+00:00", "2026-03-09T00:00:00+00:00", "3.9.9"),
        (4, 9, 4, "2026-03-01T00:00:00+00:00", "2026-03-09T00:00:00+00:00", "unknown"),
    ]


def test_no_windows_and_no_reports():
    none = _windows((7, 1, "2026-03-01", "2026-03-02")).iloc[:0]
    assert exposure.split_by_firmware(none, _reports(), pd.Series(dtype=object)).empty
    windows = _windows((7, 1, "2026-03-01", "2026-03-02"))
    assert _cut(windows, _reports(), {7: "4.1.0"}) == [
        (0, 7, 1, "2026-03-01T00:00:00+00:00", "2026-03-02T00:00:00+00:00", "4.1.0")
    ]
