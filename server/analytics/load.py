"""The only analytics module that reads the database: aggregated frames for the weekly summary.

Monitored seconds are summed in SQL per monitoring window and week, so that part grows with homes
and weeks, not with listening segments. Alerts come back as one narrow row each (their text
values coded into one integer) and are placed in windows and weeks, and counted, by pandas: on
SQLite every GROUP BY sorts all its rows, so three groupings cost several times one read. Alerts
already known to lie in a listening segment (`Alert.within_listening`) skip the segment look-up.
On PostgreSQL the monitored seconds are read on a second connection, on this session's snapshot,
while this one reads the alerts (see `_alongside`).

Frames of `PilotData` (times are aware UTC; epoch values are UTC seconds; a missing cause or
resemblance grade is ""):

- homes: home_id (int), home_code (str), state (str).
- devices: device_id, serial, hardware_model, firmware (the device's current firmware),
  last_seen_at (datetime, NaT if never), clock_skew_s (float, NaN if unknown).
- installations: installation_id, device_id, home_id, room, installed_at, removed_at (NaT if open).
- windows: `exposure.monitored_windows` cut by `exposure.split_by_firmware` (window_id,
  installation_id, device_id, home_id, room, started_at, ended_at, firmware: what the device's
  heartbeats reported then) plus the device's hardware_model.
- monitored: window_id, bucket (local ISO week index, see `trend`), seconds (float): each
  window's (device's) listening; summed by device property these are device-months.
- home_monitored: home_id, bucket, seconds: the time in which at least one of the home's devices
  listened (the union of their listening; only homes whose windows overlap read segments).
- counted: window_id, period ("week" | "before"), sound_class, outcome, cause, resemblance, alerts:
  alerts detected inside a monitored window while their device was listening. outcome is
  "false_alarm" | "confirmed" | "unsure" | "unusable" (final verdicts) or "pending".
- counted_alerts: the counted alerts one row each (for disturbances): alert_id, home_id,
  sound_class, t (epoch s, clock skew corrected), outcome, period, week_index.
- by_week: week_index, sound_class, outcome, alerts (counted alerts only).
- fa_scores: period, sound_class, score_milli (floor(1000 x score)), home_id, alerts; counted
  false alarms.
- score_floors: sound_class, firmware (as sent with the alert), min_score.
- not_counted: period, sound_class, reason ("unassigned" | "not_monitored" | "offline"), alerts.
- staged_events: staged_event_id, home_id, sound_class, started_at, ended_at, source.
- staged_alerts: alerts that may detect a staged event (same class, device installed in the
  event's home, near its time): alert_id, device_id, home_id, sound_class, detected_at (clock skew
  corrected, exact), score, window_id (float, NaN outside every window), counted (bool), period,
  week_index, outcome, cause, resemblance, score_milli.
"""

from __future__ import annotations

import datetime as dt
import gc
import logging
import re
import secrets
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
import pandas as pd
import sqlalchemy as sa
from numpy.typing import NDArray
from sqlalchemy.dialects import postgresql
from sqlalchemy.orm import Session
from sqlalchemy.sql.elements import ColumnElement

from server.analytics import exposure, trend
from server.db import UTCDateTime, sql_greatest, sql_least
from server.devices.models import Alert, AlertState, Device, FirmwareChange, ListeningSegment
from server.households.models import Home, HomeState, HomeStateChange
from server.installations.models import Installation
from server.staged.models import StagedEvent
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
    home_monitored: pd.DataFrame
    counted: pd.DataFrame
    counted_alerts: pd.DataFrame
    by_week: pd.DataFrame
    fa_scores: pd.DataFrame
    score_floors: pd.DataFrame
    not_counted: pd.DataFrame
    staged_events: pd.DataFrame
    staged_alerts: pd.DataFrame


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


def _roomier_sorts(session: Session, dialect: str) -> None:
    """PostgreSQL, for this transaction only: hash joins and aggregates stay in memory (the default
    4 MB sends a million listening segments to disk in batches), and no query is compiled to
    machine code first (large row estimates trigger it, and it costs more than it saves here)."""
    if dialect == "postgresql":
        session.execute(sa.text("SET LOCAL work_mem = '64MB'"))
        session.execute(sa.text("SET LOCAL jit = off"))


@contextmanager
def _window_table(session: Session, dialect: str, windows: pd.DataFrame) -> Iterator[sa.FromClause]:
    """The monitored windows as a table to join.

    SQLite: window_id, device_id, ws, we (epoch s) in a temporary table indexed by device and
    start, so segments are joined through the index (a VALUES list would be scanned once per
    segment). PostgreSQL: window_id, device_id, ws_at, we_at (timestamps) from an inline VALUES
    list, which needs no table to be created and dropped.
    """
    if dialect == "postgresql":
        rows = [
            (int(i), int(d), float(a), float(b))
            for i, d, a, b in zip(
                windows["window_id"],
                windows["device_id"],
                trend.epoch_s(windows["started_at"]),
                trend.epoch_s(windows["ended_at"]),
                strict=True,
            )
        ] or [(-1, -1, 0.0, 0.0)]  # VALUES needs a row; this one matches no segment
        v = sa.values(
            sa.column("window_id", sa.Integer),
            sa.column("device_id", sa.Integer),
            sa.column("ws", sa.Float),
            sa.column("we", sa.Float),
            name="v",
            literal_binds=True,
        ).data(rows)
        # As timestamps, computed once per window (OFFSET 0 keeps them from being recomputed in
        # the join), so segments are compared on their own columns and through their index.
        yield (
            sa.select(
                v.c.window_id,
                v.c.device_id,
                sa.func.to_timestamp(v.c.ws, type_=UTCDateTime).label("ws_at"),
                sa.func.to_timestamp(v.c.we, type_=UTCDateTime).label("we_at"),
            )
            .offset(0)
            .subquery("w")
        )
        return
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


_T = TypeVar("_T")
_SNAPSHOT_ID = re.compile(r"[0-9A-Fa-f]+(-[0-9A-Fa-f]+)+")


@contextmanager
def _alongside(session: Session, dialect: str, work: Callable[[Session], _T]) -> Iterator[Callable[[], _T]]:
    """Start `work` and yield a function that returns its result.

    On PostgreSQL, `work` runs in a thread on a second connection that imports this session's
    snapshot (REPEATABLE READ with SET TRANSACTION SNAPSHOT), so it reads exactly what this
    session could read at that moment. Elsewhere, or when that is not possible (a session bound
    to a connection rather than an engine, or a transaction that has already written: no other
    connection sees its writes), `work` runs here, in this session, before the yield.
    """
    bind = session.get_bind()
    snapshot = None
    if dialect == "postgresql" and isinstance(bind, sa.Engine):
        conn = session.connection()
        if conn.exec_driver_sql("SELECT txid_current_if_assigned()").scalar() is None:
            snapshot = conn.exec_driver_sql("SELECT pg_export_snapshot()").scalar_one()
    if snapshot is None or not _SNAPSHOT_ID.fullmatch(snapshot):
        done = work(session)
        yield lambda: done
        return
    assert isinstance(bind, sa.Engine)

    def run() -> _T:
        with bind.connect() as side_conn:
            side_conn = side_conn.execution_options(isolation_level="REPEATABLE READ")
            with side_conn.begin(), Session(bind=side_conn) as side:
                # SET cannot take a bound parameter; the id was checked against its pattern above.
                side_conn.exec_driver_sql(f"SET TRANSACTION SNAPSHOT '{snapshot}'")
                _roomier_sorts(side, dialect)
                return work(side)

    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="analytics") as pool:
        future = pool.submit(run)
        yield future.result


def _frame(result: sa.Result[Any], columns: list[str]) -> pd.DataFrame:
    """Result rows as a frame, built column by column (much faster than from Row objects)."""
    rows = result.all()
    if not rows:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return pd.DataFrame(dict(zip(columns, (list(col) for col in zip(*rows, strict=True)), strict=True)))


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
    changes = _firmware_changes(session, trial)
    windows = exposure.split_by_firmware(
        exposure.monitored_windows(
            installations, _home_intervals(session, trial, homes, end), start=start, end=end
        ),
        changes,
        devices.set_index("device_id")["firmware"],
    )
    windows = windows.merge(devices[["device_id", "hardware_model"]], on="device_id", how="left")
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
    _roomier_sorts(session, dialect)

    overlapping = exposure.overlapping_homes(windows)
    shared = windows[windows["home_id"].isin(overlapping)]

    def monitored_in(s: Session) -> tuple[pd.DataFrame, pd.DataFrame]:
        with _window_table(s, dialect, windows) as w:
            by_window = _monitored(s, dialect, w, steps, trial.timezone, start, end)
        if shared.empty:
            return by_window, _NO_PIECES.copy()
        with _window_table(s, dialect, shared) as w:
            pieces = _fetch(s, _pieces(dialect, w, start), _PIECE_TIMES)
        if dialect == "postgresql":  # its times count from `start`
            pieces["start_s"] += start.timestamp()
            pieces["end_s"] += start.timestamp()
        return by_window, pieces

    book = _codebook(trial, [*devices["firmware"].tolist(), *changes["firmware"].tolist()])
    # The monitored seconds are mostly the database's work and the alert read mostly this
    # process's, so where a second connection can share this session's snapshot the two overlap.
    with _alongside(session, dialect, monitored_in) as monitored_later:
        facts = place_alerts(
            _unpack(_fetch(session, _alert_facts(dialect, trial, book, start, end), _FACT_COLUMNS), book),
            windows,
            steps,
            week,
        )
        parts = _alert_parts(facts, windows)
        counted_alerts = counted_alert_rows(facts, windows)
        staged_alerts = _staged_alerts(
            session, facts, staged_events, installations, margin_s=staged_tolerance_s + 1.0
        )
        del facts
        monitored, shared_pieces = monitored_later()
    home_monitored = _home_monitored(
        monitored, windows, shared_pieces, overlapping, trial.timezone, start, end
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
        home_monitored=home_monitored,
        counted=parts["counted"],
        counted_alerts=counted_alerts,
        by_week=parts["by_week"],
        fa_scores=parts["fa_scores"],
        score_floors=parts["score_floors"],
        not_counted=parts["not_counted"],
        staged_events=staged_events,
        staged_alerts=staged_alerts,
    )


def _firmware_changes(session: Session, trial: Trial) -> pd.DataFrame:
    """When each of the trial's devices began reporting each firmware (few rows per device)."""
    return trend.as_utc(
        _frame(
            session.execute(
                sa.select(FirmwareChange.device_id, FirmwareChange.at, FirmwareChange.firmware)
                .join(Device, Device.id == FirmwareChange.device_id)
                .where(Device.trial_id == trial.id)
            ),
            ["device_id", "at", "firmware"],
        ),
        "at",
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
    session: Session,
    dialect: str,
    w: sa.FromClause,
    steps: list[trend.OffsetStep],
    tz: str,
    start: dt.datetime,
    end: dt.datetime,
) -> pd.DataFrame:
    """Listening seconds per window and local week: segments clipped to the windows, in SQL."""
    postgres = dialect == "postgresql"
    stmt = _pieces_by_week_pg(w, tz, start, end) if postgres else _pieces_by_week_sqlite(w, steps)
    agg = _fetch(session, stmt, _PIECE_COLUMNS)  # typed by _KINDS
    if postgres:  # its sums count from `start`
        agg["sum_start_s"] += agg["pieces"] * start.timestamp()
        agg["sum_end_s"] += agg["pieces"] * start.timestamp()
    return exposure.spread_over_buckets(agg, lambda k: trend.week_start_s(k, tz))


_PIECE_TIMES = ["window_id", "start_s", "end_s"]
_NO_PIECES = pd.DataFrame({"window_id": np.zeros(0, np.int64), "start_s": np.zeros(0), "end_s": np.zeros(0)})


def _pieces(dialect: str, w: sa.FromClause, start: dt.datetime) -> sa.Select[Any]:
    """Listening segments clipped to the windows `w`, one row each: window_id, start_s, end_s
    (UTC epoch seconds). Read only for homes whose devices listened at the same time."""
    s = ListeningSegment.__table__.c
    if dialect == "postgresql":
        a = sql_greatest(dialect, s.started_at, w.c.ws_at)
        b = sql_least(dialect, s.ended_at, w.c.we_at)
        origin = sa.literal(start, type_=sa.DateTime(timezone=True))
        # Seconds after `start` (an interval converts exactly); `_home_monitored` adds it back.
        return sa.select(
            w.c.window_id,
            sa.func.date_part("epoch", a - origin, type_=sa.Float).label("start_s"),
            sa.func.date_part("epoch", b - origin, type_=sa.Float).label("end_s"),
        ).select_from(
            ListeningSegment.__table__.join(
                w, (s.device_id == w.c.device_id) & (s.started_at < w.c.we_at) & (s.ended_at > w.c.ws_at)
            )
        )
    seg_a, seg_b = _epoch_s(dialect, s.started_at), _epoch_s(dialect, s.ended_at)
    return sa.select(
        w.c.window_id,
        sql_greatest(dialect, seg_a, w.c.ws).label("start_s"),
        sql_least(dialect, seg_b, w.c.we).label("end_s"),
    ).select_from(
        ListeningSegment.__table__.join(
            w, (s.device_id == w.c.device_id) & (seg_a < w.c.we) & (seg_b > w.c.ws)
        )
    )


def _home_monitored(
    monitored: pd.DataFrame,
    windows: pd.DataFrame,
    pieces: pd.DataFrame,
    overlapping: NDArray[np.int64],
    tz: str,
    start: dt.datetime,
    end: dt.datetime,
) -> pd.DataFrame:
    """Monitored seconds per home and week: the union of its devices' listening (see `exposure`)."""
    home_of = windows.set_index("window_id")["home_id"]
    merged = exposure.merge_intervals(
        pieces["window_id"].map(home_of).to_numpy(dtype=np.int64),
        pieces["start_s"].to_numpy(dtype=np.float64),
        pieces["end_s"].to_numpy(dtype=np.float64),
    )
    first, last = trend.week_index(pd.Series(pd.to_datetime([start, end], utc=True)), tz).tolist()
    union = exposure.union_over_buckets(merged, lambda k: trend.week_start_s(k, tz), (first, last))
    return exposure.home_monitored(monitored, windows, union, overlapping)


_PIECE_COLUMNS = ["window_id", "first_bucket", "last_bucket", "pieces", "sum_start_s", "sum_end_s"]


def _pieces_by_week_sqlite(w: sa.FromClause, steps: list[trend.OffsetStep]) -> sa.Select[Any]:
    """SQLite: the clipped pieces grouped by window and the local weeks of their start and end,
    with their start and end times (epoch s) summed."""
    s = ListeningSegment.__table__.c
    seg_a, seg_b = _epoch_s("sqlite", s.started_at), _epoch_s("sqlite", s.ended_at)
    pieces = (
        sa.select(
            w.c.window_id,
            sql_greatest("sqlite", seg_a, w.c.ws).label("a"),
            sql_least("sqlite", seg_b, w.c.we).label("b"),
        )
        .select_from(
            ListeningSegment.__table__.join(
                w, (s.device_id == w.c.device_id) & (seg_a < w.c.we) & (seg_b > w.c.ws)
            )
        )
        # OFFSET 0 keeps the subquery from being merged into the outer query, so a and b are
        # computed once per piece, not once per use.
        .offset(0)
        .subquery("pieces")
    )
    first, last = _local_week("sqlite", pieces.c.a, steps), _local_week("sqlite", pieces.c.b, steps)
    return (
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
    )


def _pieces_by_week_pg(w: sa.FromClause, tz: str, start: dt.datetime, end: dt.datetime) -> sa.Select[Any]:
    """PostgreSQL: as `_pieces_by_week_sqlite`, but on the timestamps themselves, with the start
    and end sums in seconds after `start`.

    Converting every segment's times to epoch seconds costs more than the rest of the query, so
    pieces are clipped by comparing timestamps, the week of a time is found by binary search
    (width_bucket) among the UTC instants at which the zone's local weeks begin, and the sums
    are exact intervals, converted to seconds once per group.
    """
    s = ListeningSegment.__table__.c
    a = sql_greatest("postgresql", s.started_at, w.c.ws_at)
    b = sql_least("postgresql", s.ended_at, w.c.we_at)
    first, last = trend.week_index(pd.Series(pd.to_datetime([start, end], utc=True)), tz).tolist()
    # Every clipped time lies in [start, end], so these instants cover them all: a time in week k
    # falls between the starts of weeks k and k + 1, and width_bucket counts from 1.
    weeks = np.arange(first, last + 2, dtype=np.int64)
    starts = pd.to_datetime(trend.week_start_s(weeks, tz), unit="s", utc=True).to_pydatetime().tolist()
    thresholds = sa.literal(starts, type_=postgresql.ARRAY(sa.DateTime(timezone=True)))
    first_bucket = sa.func.width_bucket(a, thresholds) + (first - 1)
    last_bucket = sa.func.width_bucket(b, thresholds) + (first - 1)
    origin = sa.literal(start, type_=sa.DateTime(timezone=True))
    return (
        sa.select(
            w.c.window_id,
            first_bucket,
            last_bucket,
            sa.func.count(),
            sa.func.date_part("epoch", sa.func.sum(a - origin), type_=sa.Float),
            sa.func.date_part("epoch", sa.func.sum(b - origin), type_=sa.Float),
        )
        .select_from(
            ListeningSegment.__table__.join(
                w, (s.device_id == w.c.device_id) & (s.started_at < w.c.we_at) & (s.ended_at > w.c.ws_at)
            )
        )
        .group_by(w.c.window_id, first_bucket, last_bucket)
    )


# Text columns of an alert read travel as small integer codes packed into one number (a driver
# builds a Python object per value, and those objects are most of the read's cost); a value outside
# the known list comes back as text in a column of its own, so nothing is lost.
_TEXT_KEYS = ("sound_class", "outcome", "cause", "resemblance", "firmware")
_OUTCOMES = ("false_alarm", "confirmed", "unsure", "unusable", "pending")
_GRADES = ("resembles", "unrelated")


@dataclass(frozen=True)
class _Codebook:
    """Known values per text column; code 0 is NULL, 1..n the values, n + 1 "see the text column"."""

    known: dict[str, tuple[str, ...]]

    def radix(self, key: str) -> int:
        return len(self.known[key]) + 2


def _codebook(trial: Trial, firmware: list[str]) -> _Codebook:
    return _Codebook(
        {
            "sound_class": tuple(trial.sound_classes or ()),
            "outcome": _OUTCOMES,
            "cause": tuple(c["code"] for c in (trial.causes or [])),
            "resemblance": _GRADES,
            "firmware": tuple(sorted(set(firmware))),
        }
    )


# Joins the text values of an alert with an unknown value: no such value holds a control character
# (device firmware strings are checked at the door; the rest are the trial's own codes).
_SEP = "\x1f"


def _alert_facts(
    dialect: str, trial: Trial, book: _Codebook, start: dt.datetime, end: dt.datetime
) -> sa.Select[Any]:
    """One row per alert of the trial whose effective time t (clock skew corrected, epoch s) lies in
    [start, end): t, packed (device_id, listening, assigned and the text codes; see `_unpack`),
    score, alert_id, and rest: NULL, or when any text value is not in `book`, all five joined by `_SEP`."""
    a = Alert.__table__.c
    t = _epoch_s(dialect, a.detected_at) - sa.func.coalesce(a.clock_skew_s, 0.0)
    t_at = sa.case(
        (a.clock_skew_s.is_(None), a.detected_at),
        else_=_minus_seconds(dialect, a.detected_at, a.clock_skew_s),
    )
    seg = ListeningSegment.__table__.c
    # The segment that started last at or before the alert is the only one that can hold it (a
    # device's segments do not overlap): one index seek, and only for alerts not already known to
    # lie inside a segment (Alert.within_listening), which in a running pilot are few.
    seg_end = (
        sa.select(seg.ended_at)
        .where(seg.device_id == a.device_id, seg.started_at <= t_at)
        .order_by(seg.started_at.desc())
        .limit(1)
        .scalar_subquery()
    )
    listening = sa.case((a.within_listening.is_(True), 1), (seg_end >= t_at, 1), else_=0)
    outcome = sa.case(
        (a.state == AlertState.final, sa.func.coalesce(a.final_label, "pending")), else_="pending"
    )
    text = {
        "sound_class": a.sound_class,
        "outcome": outcome,
        "cause": a.final_cause,
        "resemblance": a.final_resemblance,
        "firmware": a.firmware,
    }
    # 64-bit throughout: PostgreSQL would otherwise overflow a 32-bit product before any cast.
    packed: Any = sa.cast(listening, sa.BigInteger) + 2 * sa.case((a.home_id.is_(None), 0), else_=1)
    scale = 4
    unknown = []
    for key in _TEXT_KEYS:
        known, col = book.known[key], text[key]
        whens = [(col.is_(None), 0)] + [(col == v, i + 1) for i, v in enumerate(known)]
        packed = packed + scale * sa.case(*whens, else_=len(known) + 1)
        scale *= book.radix(key)
        unknown.append(col.not_in(known) if known else col.is_not(None))
    packed = packed + scale * sa.cast(a.device_id, sa.BigInteger)
    joined: Any = sa.literal("", sa.String)
    for n, key in enumerate(_TEXT_KEYS):
        joined = joined + (_SEP if n else "") + sa.func.coalesce(text[key], "")
    return sa.select(
        t.label("t"),
        packed.label("packed"),
        a.score,
        a.id.label("alert_id"),
        sa.case((sa.or_(*unknown), joined), else_=sa.null()).label("rest"),
    ).where(a.trial_id == trial.id, t >= start.timestamp(), t < end.timestamp())


_FACT_COLUMNS = ["t", "packed", "score", "alert_id", "rest"]


def _unpack(frame: pd.DataFrame, book: _Codebook) -> pd.DataFrame:
    """The packed column back into device_id, listening, assigned and the text columns (a NULL
    cause or grade as "")."""
    packed = frame.pop("packed").to_numpy(dtype=np.int64)
    rest_text = frame.pop("rest").to_numpy(dtype=object)
    frame["listening"] = packed % 2
    frame["assigned"] = (packed // 2) % 2
    rest = packed // 4
    others = np.flatnonzero(pd.notna(rest_text))
    split = [str(v).split(_SEP) for v in rest_text[others]]
    for n, key in enumerate(_TEXT_KEYS):
        known = book.known[key]
        code = rest % book.radix(key)
        rest = rest // book.radix(key)
        # Categorical columns group on their integer codes. Slot 0 (NULL) is "" for a cause or
        # grade; the other columns are never NULL, so their slot 0 only needs a unique name.
        categories = ["" if key in ("cause", "resemblance") else "\x00null", *known]
        other = others[code[others] == len(known) + 1]
        if len(other):
            by_row = dict(zip(others.tolist(), (parts[n] for parts in split), strict=True))
            extra, codes = np.unique(
                np.array([by_row[r] for r in other.tolist()], dtype=object), return_inverse=True
            )
            fresh = [v for v in extra.tolist() if v not in categories]
            where = {v: i for i, v in enumerate([*categories, *fresh])}
            categories = [*categories, *fresh]
            code = code.copy()
            code[other] = np.array([where[v] for v in extra.tolist()], dtype=np.int64)[codes]
        frame[key] = pd.Categorical.from_codes(code, categories=categories)
    frame["device_id"] = rest
    return frame


# How the columns of a large read are typed: numbers go straight into numpy arrays (int columns
# must hold no NULL); text stays as Python objects, which pandas groups fastest.
_KINDS: dict[str, str] = {
    "packed": "int",
    "alert_id": "int",
    "window_id": "int",
    "first_bucket": "int",
    "last_bucket": "int",
    "pieces": "int",
    "t": "float",
    "score": "float",
    "sum_start_s": "float",
    "sum_end_s": "float",
    "start_s": "float",
    "end_s": "float",
}
# PostgreSQL's binary array format: a header of 5 int32 for one dimension, then per element its
# length (int32) and its value, all big-endian.
_PG_ARRAY_HEADER = 20
_PG_ELEMENTS = {
    "int": np.dtype([("length", ">i4"), ("value", ">i8")]),
    "float": np.dtype([("length", ">i4"), ("value", ">f8")]),
}


def _fetch(session: Session, stmt: sa.Select[Any], columns: list[str]) -> pd.DataFrame:
    """Rows of `stmt` as a frame of the given column names, typed by `_KINDS`.

    Hundreds of thousands of rows come back here, and building a Python object for each value
    would cost more than the query itself:

    - PostgreSQL: each numeric column comes back as one value, its array in PostgreSQL's binary
      format (`array_send(array_agg(...))`), which numpy reads as it stands. The aggregates of
      one query level take the rows in the same order, so the columns stay aligned.
    - SQLite: the driver's rows are taken as they are, with no column type conversion (a
      timestamp comes back as its stored text). For small reads that need converted values, use
      `_frame`.
    """
    conn = session.connection()
    kinds = [_KINDS.get(name, "object") for name in columns]
    if conn.dialect.name == "postgresql":
        rows = stmt.subquery("rows")
        sql_types: dict[str, sa.types.TypeEngine[Any]] = {"int": sa.BigInteger(), "float": sa.Float(53)}
        picks: list[sa.ColumnElement[Any]] = []
        for col, kind in zip(rows.c, kinds, strict=True):
            if kind == "object":
                picks.append(sa.func.array_agg(col))
            else:
                expr: sa.ColumnElement[Any] = sa.cast(col, sql_types[kind])
                if kind == "float":
                    expr = sa.func.coalesce(expr, sa.literal(float("nan"), sa.Float(53)))
                picks.append(sa.func.array_send(sa.func.array_agg(expr)))
        compiled = sa.select(*picks).compile(
            dialect=conn.dialect, compile_kwargs={"render_postcompile": True}
        )
        with conn.connection.driver_connection.cursor(binary=True) as cursor:  # type: ignore[union-attr]
            cursor.execute(compiled.string, compiled.params)
            arrays = cursor.fetchone()
        data: dict[str, Any] = {}
        for name, kind, value in zip(columns, kinds, arrays or [None] * len(columns), strict=True):
            if kind == "object":
                arr = np.empty(len(value or ()), dtype=object)
                arr[:] = value or ()
                data[name] = pd.Series(arr, dtype=object)
                continue
            dtype = np.int64 if kind == "int" else np.float64
            if value is None:  # no rows
                data[name] = np.zeros(0, dtype=dtype)
                continue
            elements = np.frombuffer(value, dtype=_PG_ELEMENTS[kind], offset=_PG_ARRAY_HEADER)
            if (elements["length"] != 8).any():
                raise ValueError(f"NULL in the numeric column {name} of an analytics read")
            data[name] = elements["value"].astype(dtype)
        return pd.DataFrame(data)
    # Half a million row tuples would set off the cyclic garbage collector again and again; none
    # of them can be part of a cycle.
    collecting = gc.isenabled()
    gc.disable()
    try:
        result = conn.execute(stmt)
        try:
            rows_ = result.cursor.fetchall()
        finally:
            result.close()
        cols: list[Any] = list(zip(*rows_, strict=True)) if rows_ else [() for _ in columns]
        del rows_
    finally:
        if collecting:
            gc.enable()
    out: dict[str, Any] = {}
    for name, kind, values in zip(columns, kinds, cols, strict=True):
        if kind == "int":
            out[name] = np.array(values, dtype=np.int64)
        elif kind == "float":
            out[name] = np.array(values, dtype=np.float64)  # NULL becomes NaN
        else:
            arr = np.empty(len(values), dtype=object)
            arr[:] = values
            out[name] = pd.Series(arr, dtype=object)
    return pd.DataFrame(out)


def place_alerts(
    facts: pd.DataFrame, windows: pd.DataFrame, steps: list[trend.OffsetStep], week: trend.Week
) -> pd.DataFrame:
    """Give each alert its monitored window, counted flag, local week, period and score bucket.

    Pure. `facts` has device_id, t (epoch s), listening (0/1) and score; `windows` has window_id,
    device_id, started_at, ended_at (a device's windows do not overlap). An alert is in a window
    when ws <= t < we; it is counted when it is in a window and its device was listening. Every
    alert of `facts` lies before the end of `week`, so period is "week" exactly when its local week
    index is the week's.
    """
    out = facts.reset_index(drop=True)
    n = len(out)
    window_id = np.full(n, -1, dtype=np.int64)
    if n and len(windows):
        w = pd.DataFrame(
            {
                "device_id": windows["device_id"].astype(np.int64).to_numpy(),
                "ws": trend.epoch_s(windows["started_at"]),
                "we": trend.epoch_s(windows["ended_at"]),
                "wid": windows["window_id"].astype(np.int64).to_numpy(),
            }
        ).sort_values("ws", kind="mergesort")
        order = np.argsort(out["t"].to_numpy(), kind="mergesort")
        left = pd.DataFrame(
            {"device_id": out["device_id"].to_numpy()[order], "t": out["t"].to_numpy()[order]}
        )
        hit = pd.merge_asof(left, w, left_on="t", right_on="ws", by="device_id", direction="backward")
        inside = (hit["t"] < hit["we"]).to_numpy()
        window_id[order[inside]] = hit["wid"].to_numpy()[inside].astype(np.int64)
    t = out["t"].to_numpy(dtype=np.float64)
    if len(steps) > 1:
        nexts = np.array([s.from_s for s in steps[1:]], dtype=np.float64)
        offsets = np.array([s.offset_s for s in steps], dtype=np.float64)[
            np.searchsorted(nexts, t, side="right")
        ]
    else:
        offsets = np.full(n, steps[0].offset_s if steps else 0.0)
    week_index = np.floor((t + offsets + trend.MONDAY_SHIFT_S) / float(trend.WEEK_S)).astype(np.int64)
    out["window_id"] = window_id
    out["counted"] = (window_id >= 0) & (out["listening"].to_numpy() == 1)
    out["week_index"] = week_index
    out["period"] = np.where(week_index >= week.index, "week", "before")
    # The epsilon keeps a score like 0.57 (569.999... in binary) in bucket 570.
    out["score_milli"] = np.floor(out["score"].to_numpy(dtype=np.float64) * 1000.0 + 1e-6).astype(np.int64)
    return out


def _alert_parts(facts: pd.DataFrame, windows: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """The alert aggregates, from the placed alert read (`place_alerts`).

    pandas groups the one read three ways: on SQLite a GROUP BY sorts every row, so three of them
    in SQL would cost several times the read.
    """
    counted = facts[facts["counted"]]
    outside = facts[~facts["counted"]]
    # Outside every window: unassigned (no installation at ingest) or not monitored (the home's
    # state or the installation dates exclude the time). Inside one, not listening: offline.
    reason = np.where(
        outside["assigned"] == 0,
        "unassigned",
        np.where(outside["window_id"] < 0, "not_monitored", "offline"),
    )

    def tally(frame: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
        out = frame.groupby(keys, as_index=False, observed=True).size().rename(columns={"size": "alerts"})
        return _plain_text(out)

    fa = counted[counted["outcome"] == "false_alarm"]
    fa = fa.assign(
        home_id=fa["window_id"].map(windows.set_index("window_id")["home_id"]).to_numpy(dtype=np.int64)
    )
    floors = facts.groupby(["sound_class", "firmware"], as_index=False, observed=True)["score"].min()
    return {
        "counted": tally(counted, ["window_id", "period", "sound_class", "outcome", "cause", "resemblance"]),
        "by_week": tally(counted, ["week_index", "sound_class", "outcome"]),
        "fa_scores": tally(fa, ["period", "sound_class", "score_milli", "home_id"]),
        "score_floors": _plain_text(floors.rename(columns={"score": "min_score"})).astype(
            {"min_score": np.float64}
        ),
        "not_counted": tally(outside.assign(reason=reason), ["period", "sound_class", "reason"]),
    }


def counted_alert_rows(facts: pd.DataFrame, windows: pd.DataFrame) -> pd.DataFrame:
    """The counted alerts of the placed read (`place_alerts`), with the home of their window."""
    c = facts[facts["counted"]]
    home_of = windows.set_index("window_id")["home_id"]
    out = pd.DataFrame(
        {
            "alert_id": c["alert_id"].to_numpy(dtype=np.int64),
            "home_id": c["window_id"].map(home_of).to_numpy(dtype=np.int64),
            "sound_class": c["sound_class"].to_numpy(dtype=object),
            "t": c["t"].to_numpy(dtype=np.float64),
            "outcome": c["outcome"].to_numpy(dtype=object),
            "period": c["period"].to_numpy(dtype=object),
            "week_index": c["week_index"].to_numpy(dtype=np.int64),
        }
    )
    return out


def _plain_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Categorical columns back to plain text (object) columns, as the rest of analytics expects."""
    for col in frame.columns:
        if isinstance(frame[col].dtype, pd.CategoricalDtype):
            frame[col] = frame[col].astype(object)
    return frame


def staged_candidates(
    facts: pd.DataFrame, events: pd.DataFrame, installations: pd.DataFrame, *, margin_s: float
) -> NDArray[np.int64]:
    """Positions in `facts` of the alerts that may detect a staged event: of the event's sound
    class, from a device ever installed in the event's home, with t within `margin_s` of the
    event's span. Pure; `staged.match` then decides.

    facts: device_id, sound_class, t (epoch s, clock skew corrected). events: home_id,
    sound_class, started_at, ended_at. installations: device_id, home_id.
    """
    if not len(facts) or not len(events) or not len(installations):
        return np.zeros(0, dtype=np.int64)
    spans = events.loc[:, ["home_id", "sound_class"]].assign(
        lo=trend.epoch_s(events["started_at"]) - margin_s, hi=trend.epoch_s(events["ended_at"]) + margin_s
    )
    # First the alerts inside any event's span (their union, as disjoint sorted stretches): a
    # binary search each, with no sort of the alerts.
    lo, hi = spans["lo"].to_numpy(), spans["hi"].to_numpy()
    by_start = np.argsort(lo, kind="stable")
    lo, hi = lo[by_start], np.maximum.accumulate(hi[by_start])
    fresh = np.r_[True, lo[1:] > hi[:-1]]
    stretch_lo, stretch_hi = lo[fresh], hi[np.r_[np.flatnonzero(fresh)[1:] - 1, len(hi) - 1]]
    t = facts["t"].to_numpy(dtype=np.float64)
    k = np.searchsorted(stretch_lo, t, side="right") - 1
    near = np.flatnonzero((k >= 0) & (t <= stretch_hi[np.maximum(k, 0)]))
    if not len(near):
        return np.zeros(0, dtype=np.int64)
    # Then the exact test on those few: same class, device installed in the home, time in range.
    spans = spans.merge(installations.loc[:, ["device_id", "home_id"]].drop_duplicates(), on="home_id")
    few = pd.DataFrame(
        {
            "row": near,
            "device_id": facts["device_id"].to_numpy(dtype=np.int64)[near],
            "sound_class": facts["sound_class"].iloc[near].astype(object).to_numpy(),
            "t": t[near],
        }
    )
    spans["device_id"] = spans["device_id"].astype(np.int64)
    spans["sound_class"] = spans["sound_class"].astype(object)
    pairs = few.merge(spans[["device_id", "sound_class", "lo", "hi"]], on=["device_id", "sound_class"])
    hit = pairs["row"].to_numpy()[((pairs["t"] >= pairs["lo"]) & (pairs["t"] <= pairs["hi"])).to_numpy()]
    return np.unique(hit).astype(np.int64)


def _staged_alerts(
    session: Session,
    facts: pd.DataFrame,
    events: pd.DataFrame,
    installations: pd.DataFrame,
    *,
    margin_s: float,
) -> pd.DataFrame:
    """Alerts near a staged event of their class from a device installed in the event's home,
    picked from the alert read, with their exact times and home read by id."""
    frame = facts.iloc[staged_candidates(facts, events, installations, margin_s=margin_s)]
    ids = frame["alert_id"].astype(int).tolist()
    a = Alert.__table__.c
    exact = [
        _frame(
            session.execute(
                sa.select(a.id, a.home_id, a.detected_at, a.clock_skew_s).where(
                    a.id.in_(ids[k : k + _ID_CHUNK])
                )
            ),
            ["alert_id", "home_id", "detected_at", "clock_skew_s"],
        )
        for k in range(0, max(len(ids), 1), _ID_CHUNK)
    ]
    exact_frame = pd.concat(exact, ignore_index=True) if len(exact) > 1 else exact[0]
    exact_frame["alert_id"] = exact_frame["alert_id"].astype(np.int64)
    frame = frame.merge(exact_frame, on="alert_id", how="left")
    # Matching happens at the window edges, so the time comes exact from the column (the epoch
    # seconds computed in SQL carry SQLite's julianday rounding, some tens of microseconds).
    skew = pd.to_numeric(frame["clock_skew_s"], errors="coerce").fillna(0.0).astype(np.float64)
    frame["detected_at"] = pd.to_datetime(frame["detected_at"], utc=True) - pd.to_timedelta(skew, unit="s")
    frame["window_id"] = frame["window_id"].astype(float).where(frame["window_id"] >= 0)
    keep = [
        "alert_id",
        "device_id",
        "home_id",
        "sound_class",
        "detected_at",
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
    return _plain_text(frame[keep].astype({"alert_id": np.int64}))
