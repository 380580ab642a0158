"""The only analytics module that reads the database: aggregated frames for the weekly summary.

Counts and monitored seconds are summed in SQL (per monitoring window, week and class), so the
cost grows with homes and weeks, not with alerts and listening segments.

Frames of `PilotData` (times are aware UTC; epoch values are UTC seconds; a missing cause or
resemblance grade is ""):

- homes: home_id (int), home_code (str), state (str).
- devices: device_id, serial, hardware_model, firmware (the device's current firmware),
  last_seen_at (datetime, NaT if never), clock_skew_s (float, NaN if unknown).
- installations: installation_id, device_id, home_id, room, installed_at, removed_at (NaT if open).
- windows: `exposure.monitored_windows` (window_id, installation_id, device_id, home_id, room,
  started_at, ended_at) plus the device's hardware_model and firmware.
- monitored: window_id, bucket (local ISO week index, see `trend`), seconds (float).
- counted: window_id, period ("week" | "before"), sound_class, outcome, cause, resemblance, alerts:
  alerts detected inside a monitored window while their device was listening. outcome is
  "false_alarm" | "confirmed" | "unsure" | "unusable" (final verdicts) or "pending".
- by_week: week_index, sound_class, outcome, alerts (counted alerts only).
- fa_scores: period, sound_class, score_milli (floor(1000 x score)), alerts; counted false alarms.
- score_floors: sound_class, firmware (as sent with the alert), min_score.
- not_counted: period, sound_class, reason ("unassigned" | "not_monitored" | "offline"), alerts.
- staged_events: staged_event_id, home_id, sound_class, started_at, ended_at, source.
- staged_alerts: alerts that may detect a staged event (same class, device installed in the
  event's home, near its time): alert_id, device_id, home_id, sound_class, detected_at (clock skew
  corrected, exact), score, window_id, counted (bool), period, week_index, outcome, cause,
  resemblance, score_milli.
"""

from __future__ import annotations

import datetime as dt
import logging
import secrets
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.orm import Session
from sqlalchemy.sql.elements import ColumnElement

from server.analytics import exposure, trend
from server.db import sql_greatest, sql_least
from server.devices.models import Alert, AlertState, Device, ListeningSegment
from server.households.models import Home, HomeState, HomeStateChange, Installation, StagedEvent
from server.trials.models import Trial

log = logging.getLogger(__name__)

# Candidate alert ids per IN list (well under SQLite's and PostgreSQL's bound-parameter limits).
_ID_CHUNK = 5000
Expr = ColumnElement[Any]


@dataclass(frozen=True)
class PilotData:
    """Aggregated figures of one trial from its start to `end` (see the module docstring)."""

    trial: Trial
    week: trend.Week
    start: dt.datetime
    end: dt.datetime
    homes: pd.DataFrame
    devices: pd.DataFrame
    installations: pd.DataFrame
    windows: pd.DataFrame
    monitored: pd.DataFrame
    counted: pd.DataFrame
    by_week: pd.DataFrame
    fa_scores: pd.DataFrame
    score_floors: pd.DataFrame
    not_counted: pd.DataFrame
    staged_events: pd.DataFrame
    staged_alerts: pd.DataFrame
    max_skew_s: float


# ---------------------------------------------------------------------------------------
# The few expressions whose SQL differs between SQLite and PostgreSQL. They sit here rather than
# in server/db.py because only this module needs them; each has one branch per dialect.


def _epoch_s(dialect: str, col: Any) -> Expr:
    """Seconds since 1970 (UTC) of a UTCDateTime column, as a float."""
    if dialect == "sqlite":
        # 2440587.5 is the Julian day of 1970-01-01 00:00 UTC; julianday() keeps milliseconds.
        return (sa.func.julianday(col) - 2440587.5) * 86400.0
    # date_part gives double precision; EXTRACT gives numeric, several times slower to compute with.
    return sa.func.date_part("epoch", col, type_=sa.Float)


def _from_epoch(dialect: str, seconds: Any) -> Expr:
    """A value comparable with UTCDateTime columns (so their indexes apply) from epoch seconds."""
    if dialect == "sqlite":
        return sa.func.strftime("%Y-%m-%d %H:%M:%f", seconds, "unixepoch")
    return sa.func.to_timestamp(seconds)


def _floor_int(dialect: str, x: Any) -> Expr:
    """floor(x) as an integer, for x >= 0 (SQLite's CAST truncates, PostgreSQL's rounds)."""
    if dialect == "sqlite":
        return sa.cast(x, sa.Integer)
    return sa.cast(sa.func.floor(x), sa.BigInteger)


def _minus_seconds(dialect: str, col: Any, seconds: Any) -> Expr:
    """A UTCDateTime column moved back by `seconds` (float), comparable with other such columns."""
    if dialect == "sqlite":
        return sa.func.strftime("%Y-%m-%d %H:%M:%f", col, sa.func.printf("%+.3f seconds", -seconds))
    shifted: Expr = col - sa.func.make_interval(0, 0, 0, 0, 0, 0, seconds)
    return shifted


# ---------------------------------------------------------------------------------------


def _local_week(dialect: str, epoch: Any, steps: list[trend.OffsetStep]) -> Expr:
    """Local ISO week index of an epoch-seconds expression (the time zone's offsets as a CASE)."""
    local: Any
    if len(steps) == 1:
        local = epoch + steps[0].offset_s
    else:
        pairs = zip(steps, steps[1:], strict=False)
        local = sa.case(
            *[(epoch < nxt.from_s, epoch + cur.offset_s) for cur, nxt in pairs],
            else_=epoch + steps[-1].offset_s,
        )
    week: Expr = _floor_int(dialect, (local + trend.MONDAY_SHIFT_S) / float(trend.WEEK_S))
    return week


@contextmanager
def _window_table(session: Session, windows: pd.DataFrame) -> Iterator[sa.Table]:
    """The monitored windows as a temporary table indexed by device and start.

    Alerts are then read in one sequential pass, each finding its window through the index; a
    VALUES list would be scanned once per alert on SQLite.
    """
    name = f"analytics_window_{secrets.token_hex(6)}"
    table = sa.Table(
        name,
        sa.MetaData(),
        sa.Column("window_id", sa.Integer, primary_key=True, autoincrement=False),
        sa.Column("device_id", sa.Integer, nullable=False),
        sa.Column("ws", sa.Float, nullable=False),
        sa.Column("we", sa.Float, nullable=False),
        sa.Index(f"ix_{name}", "device_id", "ws"),
        prefixes=["TEMPORARY"],
    )
    conn = session.connection()
    table.create(conn)
    try:
        if len(windows):
            rows = pd.DataFrame(
                {
                    "window_id": windows["window_id"].astype(int),
                    "device_id": windows["device_id"],
                    "ws": trend.epoch_s(windows["started_at"]),
                    "we": trend.epoch_s(windows["ended_at"]),
                }
            )
            conn.execute(
                table.insert(),
                [
                    {k: (int(v) if k in ("window_id", "device_id") else float(v)) for k, v in r.items()}
                    for r in rows.to_dict("records")
                ],
            )
        yield table
    finally:
        try:
            table.drop(conn)
        except sa.exc.SQLAlchemyError:  # a failed transaction: its rollback removes the table anyway
            log.warning("could not drop temporary table %s", name, exc_info=True)


def _frame(result: sa.Result[Any], columns: list[str]) -> pd.DataFrame:
    """Result rows as a frame, built column by column (much faster than from Row objects)."""
    rows = result.all()
    if not rows:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return pd.DataFrame(dict(zip(columns, (list(col) for col in zip(*rows, strict=True)), strict=True)))


def _blank_missing(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Missing causes and grades as "" (a NULL would drop out of, or split, pandas group keys)."""
    for col in columns:
        frame[col] = frame[col].fillna("").astype(str)
    return frame


def trial_window(trial: Trial, week: trend.Week, now: dt.datetime) -> tuple[dt.datetime, dt.datetime]:
    """Trial start to the end of `week`, capped at the trial's last day and at `now`."""
    start_at = trend.local_midnight(trial.starts_on, trial.timezone)
    end = min(week.end_at, now)
    if trial.ends_on is not None:
        end = min(end, trend.local_midnight(trial.ends_on + dt.timedelta(days=1), trial.timezone))
    return start_at, max(end, start_at)


def load_pilot(
    session: Session, trial: Trial, week: trend.Week, *, now: dt.datetime, staged_tolerance_s: float
) -> PilotData:
    """Everything the weekly summary needs for `trial`, from its start to the end of `week`."""
    dialect = session.get_bind().dialect.name
    start, end = trial_window(trial, week, now)
    homes = _frame(
        session.execute(
            sa.select(Home.id, Home.code, Home.state).where(Home.trial_id == trial.id).order_by(Home.code)
        ),
        ["home_id", "home_code", "state"],
    )
    devices = _frame(
        session.execute(
            sa.select(
                Device.id,
                Device.serial,
                Device.hardware_model,
                sa.func.coalesce(Device.firmware, "unknown"),
                Device.last_seen_at,
                Device.clock_skew_s,
            ).where(Device.trial_id == trial.id)
        ),
        ["device_id", "serial", "hardware_model", "firmware", "last_seen_at", "clock_skew_s"],
    )
    devices["clock_skew_s"] = pd.to_numeric(devices["clock_skew_s"], errors="coerce").astype(np.float64)
    installations = trend.as_utc(
        _frame(
            session.execute(
                sa.select(
                    Installation.id,
                    Installation.device_id,
                    Installation.home_id,
                    Installation.room,
                    Installation.installed_at,
                    Installation.removed_at,
                )
                .join(Home, Home.id == Installation.home_id)
                .where(Home.trial_id == trial.id)
            ),
            ["installation_id", "device_id", "home_id", "room", "installed_at", "removed_at"],
        ),
        "installed_at",
        "removed_at",
    )
    windows = exposure.monitored_windows(
        installations, _home_intervals(session, trial, homes, end), start=start, end=end
    )
    windows = windows.merge(devices[["device_id", "hardware_model", "firmware"]], on="device_id", how="left")
    staged_events = trend.as_utc(
        _frame(
            session.execute(
                sa.select(
                    StagedEvent.id,
                    StagedEvent.home_id,
                    StagedEvent.sound_class,
                    StagedEvent.started_at,
                    StagedEvent.ended_at,
                    StagedEvent.source,
                )
                .where(
                    StagedEvent.trial_id == trial.id,
                    StagedEvent.started_at < end,
                    StagedEvent.ended_at > start,
                )
                .order_by(StagedEvent.started_at, StagedEvent.id)
            ),
            ["staged_event_id", "home_id", "sound_class", "started_at", "ended_at", "source"],
        ),
        "started_at",
        "ended_at",
    )

    steps = trend.utc_offset_steps(trial.timezone, start, end)
    with _window_table(session, windows) as w:
        monitored = _monitored(session, dialect, w, steps, trial.timezone)
        parts = _alert_parts(session, dialect, trial, w, steps, start, end, week)
        staged_alerts = _staged_alerts(
            session,
            dialect,
            trial,
            w,
            steps,
            start,
            end,
            week,
            margin_s=staged_tolerance_s + parts["max_skew_s"] + 1.0,
        )
    return PilotData(
        trial=trial,
        week=week,
        start=start,
        end=end,
        homes=homes,
        devices=trend.as_utc(devices, "last_seen_at"),
        installations=installations,
        windows=windows,
        monitored=monitored,
        counted=parts["counted"],
        by_week=parts["by_week"],
        fa_scores=parts["fa_scores"],
        score_floors=parts["score_floors"],
        not_counted=parts["not_counted"],
        staged_events=staged_events,
        staged_alerts=staged_alerts,
        max_skew_s=parts["max_skew_s"],
    )


def _home_intervals(session: Session, trial: Trial, homes: pd.DataFrame, end: dt.datetime) -> pd.DataFrame:
    """Each home's monitored stretches from its recorded lifecycle."""
    changes = _frame(
        session.execute(
            sa.select(
                HomeStateChange.home_id,
                HomeStateChange.at,
                HomeStateChange.to_state,
                HomeStateChange.listening,
            )
            .join(Home, Home.id == HomeStateChange.home_id)
            .where(Home.trial_id == trial.id)
            .order_by(HomeStateChange.home_id, HomeStateChange.at, HomeStateChange.id)
        ),
        ["home_id", "at", "to_state", "listening"],
    )
    # A home without a recorded history has been in its current state since it was created.
    bare = homes[~homes["home_id"].isin(changes["home_id"])]
    if len(bare):
        created = dict(
            session.execute(
                sa.select(Home.id, Home.created_at).where(Home.id.in_(bare["home_id"].tolist()))
            ).all()
        )
        extra = pd.DataFrame(
            {
                "home_id": bare["home_id"],
                "at": bare["home_id"].map(created),
                "to_state": bare["state"],
                "listening": True,
            }
        )
        changes = pd.concat([changes, extra], ignore_index=True) if len(changes) else extra
    return exposure.home_intervals(changes, until=end, monitored_states=HomeState.monitored)


def _monitored(
    session: Session, dialect: str, w: sa.Table, steps: list[trend.OffsetStep], tz: str
) -> pd.DataFrame:
    """Listening seconds per window and local week: segments clipped to the windows, in SQL."""
    s = ListeningSegment.__table__.c
    seg_a, seg_b = _epoch_s(dialect, s.started_at), _epoch_s(dialect, s.ended_at)
    pieces = (
        sa.select(
            w.c.window_id,
            sql_greatest(dialect, seg_a, w.c.ws).label("a"),
            sql_least(dialect, seg_b, w.c.we).label("b"),
        )
        .select_from(
            ListeningSegment.__table__.join(
                w, (s.device_id == w.c.device_id) & (seg_a < w.c.we) & (seg_b > w.c.ws)
            )
        )
        # OFFSET 0 keeps the subquery from being merged into the outer query (SQLite and
        # PostgreSQL alike), so a and b are computed once per piece, not once per use.
        .offset(0)
        .subquery("pieces")
    )
    first, last = _local_week(dialect, pieces.c.a, steps), _local_week(dialect, pieces.c.b, steps)
    agg = _frame(
        session.execute(
            sa.select(
                pieces.c.window_id,
                first,
                last,
                sa.func.count(),
                sa.func.sum(pieces.c.a),
                sa.func.sum(pieces.c.b),
            )
            .where(pieces.c.b > pieces.c.a)
            .group_by(pieces.c.window_id, first, last)
        ),
        ["window_id", "first_bucket", "last_bucket", "pieces", "sum_start_s", "sum_end_s"],
    )
    agg = agg.astype(
        {
            "window_id": np.int64,
            "first_bucket": np.int64,
            "last_bucket": np.int64,
            "pieces": np.int64,
            "sum_start_s": np.float64,
            "sum_end_s": np.float64,
        }
    )
    return exposure.spread_over_buckets(agg, lambda k: trend.week_start_s(k, tz))


def _alert_rows(
    dialect: str,
    trial: Trial,
    w: sa.Table,
    steps: list[trend.OffsetStep],
    start: dt.datetime,
    end: dt.datetime,
    week: trend.Week,
    *where: Any,
) -> sa.Select[Any]:
    """Per-alert derived columns: effective time t (clock skew corrected, epoch s), the monitored
    window holding it (NULL when none), whether the device was listening then (counted 0/1),
    period, local week, outcome and the score in thousandths."""
    a = Alert.__table__.c
    t = _epoch_s(dialect, a.detected_at) - sa.func.coalesce(a.clock_skew_s, 0.0)
    t_at = sa.case(
        (a.clock_skew_s.is_(None), a.detected_at),
        else_=_minus_seconds(dialect, a.detected_at, a.clock_skew_s),
    )
    outcome = sa.case(
        (a.state == AlertState.final, sa.func.coalesce(a.final_label, "pending")), else_="pending"
    )
    al = (
        sa.select(
            a.id,
            a.device_id,
            a.home_id,
            a.sound_class,
            a.score,
            a.firmware,
            a.clock_skew_s,
            outcome.label("outcome"),
            a.final_cause.label("cause"),
            a.final_resemblance.label("resemblance"),
            t.label("t"),
            t_at.label("t_at"),
        )
        .where(a.trial_id == trial.id, *where)
        .subquery("al")
    )
    seg = ListeningSegment.__table__.c
    # The segment that started last at or before the alert is the only one that can hold it
    # (a device's segments do not overlap): one index seek per alert. Compared as stored values,
    # not epoch seconds, so that an index holding ended_at too answers it alone.
    seg_end = (
        sa.select(seg.ended_at)
        .where(seg.device_id == al.c.device_id, seg.started_at <= al.c.t_at)
        .order_by(seg.started_at.desc())
        .limit(1)
        .scalar_subquery()
    )
    listening = sa.case((w.c.window_id.is_(None), 0), (seg_end >= al.c.t_at, 1), else_=0)
    return (
        sa.select(
            al.c.id,
            al.c.device_id,
            al.c.home_id,
            al.c.sound_class,
            al.c.score,
            al.c.firmware,
            al.c.clock_skew_s,
            al.c.outcome,
            al.c.cause,
            al.c.resemblance,
            w.c.window_id,
            listening.label("counted"),
            sa.case((al.c.t >= week.start_at.timestamp(), "week"), else_="before").label("period"),
            _local_week(dialect, al.c.t, steps).label("week_index"),
            # The epsilon keeps a score like 0.57 (569.999... in binary) in bucket 570.
            _floor_int(dialect, al.c.score * 1000.0 + 1e-6).label("score_milli"),
        )
        .select_from(
            al.outerjoin(w, (w.c.device_id == al.c.device_id) & (al.c.t >= w.c.ws) & (al.c.t < w.c.we))
        )
        .where(al.c.t >= start.timestamp(), al.c.t < end.timestamp())
    )


# The grouping keys of the parts of the alert statement (a part leaves the others NULL).
_PART_KEYS: dict[str, Any] = {
    "window_id": sa.Integer,
    "period": sa.String,
    "week_index": sa.BigInteger,
    "sound_class": sa.String,
    "outcome": sa.String,
    "cause": sa.String,
    "resemblance": sa.String,
    "firmware": sa.String,
    "score_milli": sa.BigInteger,
    "assigned": sa.Integer,
    "counted": sa.Integer,
}


def _alert_parts(
    session: Session,
    dialect: str,
    trial: Trial,
    w: sa.Table,
    steps: list[trend.OffsetStep],
    start: dt.datetime,
    end: dt.datetime,
    week: trend.Week,
) -> dict[str, Any]:
    """The alert aggregates in one statement over one pass of the alerts (materialised once)."""
    rows = _alert_rows(dialect, trial, w, steps, start, end, week).subquery("rows")
    # Only the columns the parts group or aggregate are kept (the materialised copy stays narrow).
    keep = (
        "window_id",
        "home_id",
        "sound_class",
        "outcome",
        "cause",
        "resemblance",
        "firmware",
        "counted",
        "period",
        "week_index",
        "score_milli",
        "score",
        "clock_skew_s",
    )
    base = sa.select(*[rows.c[k] for k in keep]).cte("base").prefix_with("MATERIALIZED")
    c = base.c

    def part(name: str, keys: dict[str, Any], where: Any = None) -> sa.Select[Any]:
        cols: list[Any] = [sa.literal(name).label("part")]
        cols += [
            keys[k].label(k) if k in keys else sa.cast(sa.null(), typ).label(k)
            for k, typ in _PART_KEYS.items()
        ]
        cols += [
            sa.func.count().label("alerts"),
            sa.cast(sa.func.min(c.score), sa.Float).label("min_score"),
            sa.cast(sa.func.max(sa.func.abs(c.clock_skew_s)), sa.Float).label("max_skew"),
        ]
        q = sa.select(*cols).select_from(base)
        return (q if where is None else q.where(where)).group_by(*keys.values())

    assigned = sa.case((c.home_id.is_(None), 0), else_=1)
    stmt = sa.union_all(
        part(
            "main",
            {
                "window_id": c.window_id,
                "period": c.period,
                "sound_class": c.sound_class,
                "outcome": c.outcome,
                "cause": c.cause,
                "resemblance": c.resemblance,
                "firmware": c.firmware,
                "assigned": assigned,
                "counted": c.counted,
            },
        ),
        part(
            "by_week",
            {"week_index": c.week_index, "sound_class": c.sound_class, "outcome": c.outcome},
            c.counted == 1,
        ),
        part(
            "fa_scores",
            {"period": c.period, "sound_class": c.sound_class, "score_milli": c.score_milli},
            (c.counted == 1) & (c.outcome == "false_alarm"),
        ),
    )
    df = _frame(session.execute(stmt), ["part", *_PART_KEYS, "alerts", "min_score", "max_skew"])

    def pick(name: str, keep: list[str]) -> pd.DataFrame:
        out = df.loc[df["part"] == name, keep].reset_index(drop=True)
        for col in {"week_index", "score_milli", "alerts", "assigned", "counted"} & set(keep):
            out[col] = out[col].astype(np.int64)
        return out

    main = _blank_missing(
        pick(
            "main",
            [
                "window_id",
                "period",
                "sound_class",
                "outcome",
                "cause",
                "resemblance",
                "firmware",
                "assigned",
                "counted",
                "alerts",
                "min_score",
                "max_skew",
            ],
        ),
        ["cause", "resemblance"],
    )
    counted = main[main["counted"] == 1].astype({"window_id": np.int64})
    outside = main[main["counted"] == 0]
    # Outside every window: unassigned (no installation at ingest) or not monitored (the home's
    # state or the installation dates exclude the time). Inside one, not listening: offline.
    reason = np.where(
        outside["assigned"] == 0,
        "unassigned",
        np.where(outside["window_id"].isna(), "not_monitored", "offline"),
    )
    not_counted = (
        outside.assign(reason=reason)
        .groupby(["period", "sound_class", "reason"], as_index=False)["alerts"]
        .sum()
    )
    skew = pd.to_numeric(main["max_skew"], errors="coerce").max() if len(main) else 0.0
    return {
        "max_skew_s": 0.0 if pd.isna(skew) else float(skew),
        "counted": counted.groupby(
            ["window_id", "period", "sound_class", "outcome", "cause", "resemblance"], as_index=False
        )["alerts"].sum(),
        "by_week": pick("by_week", ["week_index", "sound_class", "outcome", "alerts"]),
        "fa_scores": pick("fa_scores", ["period", "sound_class", "score_milli", "alerts"]),
        "score_floors": main.groupby(["sound_class", "firmware"], as_index=False)["min_score"]
        .min()
        .astype({"min_score": np.float64}),
        "not_counted": not_counted,
    }


def _staged_alerts(
    session: Session,
    dialect: str,
    trial: Trial,
    w: sa.Table,
    steps: list[trend.OffsetStep],
    start: dt.datetime,
    end: dt.datetime,
    week: trend.Week,
    *,
    margin_s: float,
) -> pd.DataFrame:
    """Alerts near a staged event of their class from a device installed in the event's home."""
    a, e, i = Alert.__table__.c, StagedEvent.__table__.c, Installation.__table__.c
    bounds = (
        sa.select(
            e.id,
            e.home_id,
            e.sound_class,
            _from_epoch(dialect, _epoch_s(dialect, e.started_at) - margin_s).label("lo"),
            _from_epoch(dialect, _epoch_s(dialect, e.ended_at) + margin_s).label("hi"),
        )
        .where(e.trial_id == trial.id)
        .offset(0)
        .subquery("bounds")
    )
    installed = sa.exists().where(i.device_id == a.device_id, i.home_id == bounds.c.home_id)
    # First the candidates' ids: walk the events, each one's short time range on the
    # (trial, detected_at) index. A separate statement, because inside the next one a planner may
    # choose to test every alert against every event.
    near = (
        sa.select(a.id)
        .select_from(
            bounds.join(
                Alert.__table__,
                (a.trial_id == trial.id) & (a.detected_at >= bounds.c.lo) & (a.detected_at <= bounds.c.hi),
            )
        )
        # No class condition here: SQLite would index the events by class and scan every alert.
        # Alerts of other classes are dropped by the matching itself.
        .where(installed)
        .distinct()
    )
    ids = sorted(session.scalars(near))
    columns = [
        "alert_id",
        "device_id",
        "home_id",
        "sound_class",
        "detected_at",
        "clock_skew_s",
        "score",
        "window_id",
        "counted",
        "period",
        "week_index",
        "outcome",
        "cause",
        "resemblance",
        "score_milli",
    ]
    chunks = []
    for k in range(0, max(len(ids), 1), _ID_CHUNK):
        rows = _alert_rows(
            dialect,
            trial,
            w,
            steps,
            start,
            end,
            week,
            a.id.in_(ids[k : k + _ID_CHUNK]),
        ).subquery()
        chunks.append(
            _frame(
                session.execute(
                    sa.select(
                        rows.c.id,
                        rows.c.device_id,
                        rows.c.home_id,
                        rows.c.sound_class,
                        a.detected_at,
                        rows.c.clock_skew_s,
                        rows.c.score,
                        rows.c.window_id,
                        rows.c.counted,
                        rows.c.period,
                        rows.c.week_index,
                        rows.c.outcome,
                        rows.c.cause,
                        rows.c.resemblance,
                        rows.c.score_milli,
                    ).join_from(rows, Alert.__table__, a.id == rows.c.id)
                ),
                columns,
            )
        )
    frame = pd.concat(chunks, ignore_index=True) if len(chunks) > 1 else chunks[0]
    # Matching happens at the window edges, so the time comes exact from the column (the epoch
    # seconds computed in SQL carry SQLite's julianday rounding, some tens of microseconds).
    skew = pd.to_numeric(frame["clock_skew_s"], errors="coerce").fillna(0.0).astype(np.float64)
    frame["detected_at"] = pd.to_datetime(frame["detected_at"], utc=True) - pd.to_timedelta(skew, unit="s")
    frame["counted"] = frame["counted"].astype(bool)
    return _blank_missing(frame.drop(columns="clock_skew_s"), ["cause", "resemblance"])
