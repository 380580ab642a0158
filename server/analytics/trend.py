"""ISO weeks in a trial's time zone, and the false-alarm rate week by week.

Pure functions; the clock is passed in (`now`), never read.
"""

from __future__ import annotations

import datetime as dt
import functools
import re
from dataclasses import dataclass
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from server.analytics import rates

WEEK_S = 7 * 86400
# Week index k counts weeks from Monday 1969-12-29 in local time: the epoch day 0
# (1970-01-01) was a Thursday, three days after that Monday.
EPOCH_MONDAY = dt.date(1969, 12, 29)
MONDAY_SHIFT_S = 3 * 86400
_WEEK_LABEL = re.compile(r"^(\d{4})-W(\d{2})$")


@dataclass(frozen=True)
class Week:
    """One ISO week (Monday to Monday) in a time zone."""

    label: str
    index: int
    starts_on: dt.date
    start_at: dt.datetime
    end_at: dt.datetime


@dataclass(frozen=True)
class OffsetStep:
    """From `from_s` (UTC epoch seconds) on, local time is UTC plus `offset_s` seconds."""

    from_s: float
    offset_s: float


def as_utc(frame: pd.DataFrame, *columns: str) -> pd.DataFrame:
    """A copy of `frame` with `columns` as UTC timestamps (naive values are taken as UTC)."""
    return frame.assign(**{c: pd.to_datetime(frame[c], utc=True) for c in columns})


def epoch_s(values: pd.Series | pd.DatetimeIndex) -> NDArray[np.float64]:
    """UTC epoch seconds of aware timestamps, whatever their stored resolution."""
    idx = pd.DatetimeIndex(values)
    return np.asarray(idx.as_unit("ns").asi8 / 1e9, dtype=np.float64)


def parse_week(label: str) -> tuple[int, int]:
    """'2026-W48' -> (2026, 48); ValueError for anything else or a week the year does not have."""
    m = _WEEK_LABEL.match(label.strip())
    if not m:
        raise ValueError(f"{label!r} is not an ISO week like 2026-W48")
    year, week = int(m.group(1)), int(m.group(2))
    try:
        dt.date.fromisocalendar(year, week, 1)
    except ValueError:
        raise ValueError(f"{year} has no ISO week {week}") from None
    return year, week


def local_midnight(day: dt.date, tz: str | ZoneInfo) -> dt.datetime:
    """The first instant (aware, UTC) whose local wall time in `tz` is 00:00 or later on `day`."""
    zone = tz if isinstance(tz, ZoneInfo) else ZoneInfo(tz)
    ts = pd.Timestamp(day).tz_localize(zone, ambiguous=True, nonexistent="shift_forward")
    out: dt.datetime = ts.tz_convert("UTC").to_pydatetime()
    return out


@functools.lru_cache(maxsize=4096)
def week_from_index(index: int, tz: str) -> Week:
    """The ISO week with local week index `index` in `tz` (cached: every trend asks for the same weeks)."""
    zone = ZoneInfo(tz)
    monday = EPOCH_MONDAY + dt.timedelta(days=7 * int(index))
    year, week, _ = monday.isocalendar()
    return Week(
        label=f"{year:04d}-W{week:02d}",
        index=int(index),
        starts_on=monday,
        start_at=local_midnight(monday, zone),
        end_at=local_midnight(monday + dt.timedelta(days=7), zone),
    )


def week(label: str, tz: str) -> Week:
    """The ISO week `label` ('2026-W48') in time zone `tz`."""
    year, wk = parse_week(label)
    monday = dt.date.fromisocalendar(year, wk, 1)
    return week_from_index((monday - EPOCH_MONDAY).days // 7, tz)


def week_of(instant: dt.datetime, tz: str) -> Week:
    """The ISO week, in `tz`, that contains the aware `instant`."""
    local = instant.astimezone(ZoneInfo(tz)).date()
    return week_from_index((local - EPOCH_MONDAY).days // 7, tz)


def last_complete_week(now: dt.datetime, tz: str) -> Week:
    """The most recent ISO week that has ended by `now` (the week before the current one)."""
    return week_from_index(week_of(now, tz).index - 1, tz)


def week_start_s(index: ArrayLike, tz: str) -> NDArray[np.float64]:
    """UTC epoch seconds at which each local week index begins."""
    k = np.asarray(index, dtype=np.int64)
    mondays = pd.to_datetime(EPOCH_MONDAY) + pd.to_timedelta(7 * k, unit="D")
    local = pd.DatetimeIndex(mondays).tz_localize(
        ZoneInfo(tz), ambiguous=np.ones(len(k), dtype=bool), nonexistent="shift_forward"
    )
    return epoch_s(local)


def week_index(instants: pd.Series, tz: str) -> NDArray[np.int64]:
    """Local ISO week index of each aware timestamp (same buckets as the SQL in `load`)."""
    if len(instants) == 0:
        return np.zeros(0, dtype=np.int64)
    local = pd.DatetimeIndex(instants).tz_convert(ZoneInfo(tz)).tz_localize(None)
    days = (local - pd.Timestamp(EPOCH_MONDAY)) // pd.Timedelta(days=1)
    return np.asarray(np.floor_divide(np.asarray(days, dtype=np.int64), 7), dtype=np.int64)


def utc_offset_steps(tz: str, start: dt.datetime, end: dt.datetime) -> list[OffsetStep]:
    """The zone's UTC offset over [start, end): the first step covers everything before the next.

    Found by sampling every 15 minutes (every zone in use changes offset on a quarter hour).
    """
    zone = ZoneInfo(tz)
    grid = pd.date_range(
        pd.Timestamp(start).tz_convert("UTC").floor("15min") - pd.Timedelta(minutes=15),
        pd.Timestamp(end).tz_convert("UTC").ceil("15min"),
        freq="15min",
    )
    offsets = np.asarray(
        ((grid.tz_convert(zone).tz_localize(None) - grid.tz_localize(None)) / pd.Timedelta(seconds=1)),
        dtype=np.float64,
    )
    change = np.flatnonzero(np.diff(offsets) != 0) + 1
    steps = [OffsetStep(from_s=-np.inf, offset_s=float(offsets[0]))]
    starts = epoch_s(grid)
    steps += [OffsetStep(from_s=float(starts[i]), offset_s=float(offsets[i])) for i in change]
    return steps


def weekly_rates(
    weeks: pd.DataFrame,
    *,
    first_index: int,
    last_index: int,
    tz: str,
    confidence_level: float = 0.95,
) -> pd.DataFrame:
    """False alarms per home-month for every week from `first_index` to `last_index`.

    Parameters
    ----------
    weeks: week_index, false_alarms, home_months (missing weeks count as zero of both).

    Returns
    -------
    Columns week (label), starts_on, false_alarms, home_months, rate, low, high, reason; a week
    without monitored time has NaN rate and reason "no_monitored_time".
    """
    idx = np.arange(first_index, last_index + 1)
    full = weeks.groupby("week_index")[["false_alarms", "home_months"]].sum().reindex(idx, fill_value=0)
    r = rates.poisson_rate_arrays(
        full["false_alarms"].to_numpy(),
        full["home_months"].to_numpy(dtype=np.float64),
        confidence_level=confidence_level,
    )
    labels = [week_from_index(int(k), tz) for k in idx]
    return pd.DataFrame(
        {
            "week": [w.label for w in labels],
            "starts_on": [w.starts_on for w in labels],
            "false_alarms": r.events,
            "home_months": r.home_months,
            "rate": r.estimate,
            "low": r.low,
            "high": r.high,
            "reason": r.reasons(),
        }
    )
