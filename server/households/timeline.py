"""Time intervals: overlap, union, clipping and hours per local week.

Pure functions over aware datetimes; no database access. An interval is half-open
[start, end); an end of None means "still open".
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from collections.abc import Iterable
from dataclasses import dataclass

Interval = tuple[dt.datetime, dt.datetime]


def overlaps(
    a_start: dt.datetime, a_end: dt.datetime | None, b_start: dt.datetime, b_end: dt.datetime | None
) -> bool:
    """True when [a_start, a_end) and [b_start, b_end) share any instant (None: open-ended)."""
    a_before_b_ends = b_end is None or a_start < b_end
    b_before_a_ends = a_end is None or b_start < a_end
    return a_before_b_ends and b_before_a_ends


def clip(intervals: Iterable[Interval], start: dt.datetime, end: dt.datetime) -> list[Interval]:
    """The parts of ``intervals`` inside [start, end), empty parts dropped."""
    out = []
    for s, e in intervals:
        s2, e2 = max(s, start), min(e, end)
        if e2 > s2:
            out.append((s2, e2))
    return out


def union(intervals: Iterable[Interval]) -> list[Interval]:
    """Sorted, non-overlapping intervals covering the same instants (touching ones merge)."""
    out: list[Interval] = []
    for s, e in sorted(i for i in intervals if i[1] > i[0]):
        if out and s <= out[-1][1]:
            if e > out[-1][1]:
                out[-1] = (out[-1][0], e)
        else:
            out.append((s, e))
    return out


@dataclass(frozen=True)
class WeekHours:
    week_start: dt.date  # the Monday of the week, in the given time zone
    hours: float


def week_start_of(at: dt.datetime, tz: str) -> dt.date:
    local = at.astimezone(zoneinfo.ZoneInfo(tz)).date()
    return local - dt.timedelta(days=local.weekday())


def _monday_midnight(day: dt.date, tz: str) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(0), tzinfo=zoneinfo.ZoneInfo(tz)).astimezone(dt.UTC)


def hours_per_week(
    intervals: Iterable[Interval], tz: str, *, first_week: dt.date, last_week: dt.date
) -> list[WeekHours]:
    """Hours of the union of ``intervals`` in each local week (Monday 00:00) from first to last week.

    Weeks are cut at local midnight, so a week holding a daylight-saving change lasts 167 or 169 h.
    Every week in the range gets a row, with 0.0 when nothing falls in it.
    """
    merged = union(intervals)
    rows = []
    week = first_week
    while week <= last_week:
        nxt = week + dt.timedelta(days=7)
        ws, we = _monday_midnight(week, tz), _monday_midnight(nxt, tz)
        secs = sum((e - s).total_seconds() for s, e in clip(merged, ws, we))
        rows.append(WeekHours(week, secs / 3600.0))
        week = nxt
    return rows
