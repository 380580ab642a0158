"""Monitored seconds read on a second connection, alongside the alert read (PostgreSQL), against
the same figures read in turn on the session's own connection; and week buckets across a clock
change on both backends."""

from __future__ import annotations

import datetime as dt
import threading
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa
from sqlalchemy.orm import Session

from server.analytics import load, trend
from server.db import make_engine
from server.devices.models import ListeningSegment
from server.settings import Settings
from server.trials.models import Trial
from tests import factories
from tests.conftest import committed_session

UTC = dt.UTC
NOW = dt.datetime(2026, 11, 17, 12, tzinfo=UTC)
# Europe/London leaves summer time at 01:00 UTC on Sunday 2026-10-25, so local week 2026-W43
# (Monday 19 October 00:00 BST to Monday 26 October 00:00 GMT) lasts 7 days and 1 hour.
LONG_WEEK_S = 7 * 86400 + 3600


@pytest.fixture
def pilot(fresh_settings: Settings) -> Settings:
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s, code="ALDER", starts_on=dt.date(2026, 9, 7), timezone="Europe/London")
        first, _ = factories.make_device(s, trial)
        second, _ = factories.make_device(s, trial)
        factories.make_installed_home(s, trial, first, installed_at=dt.datetime(2026, 9, 7, 9, tzinfo=UTC))
        factories.make_installed_home(s, trial, second, installed_at=dt.datetime(2026, 9, 7, 9, tzinfo=UTC))
        spans = [
            # One segment over six weeks, across the clock change.
            (first, dt.datetime(2026, 10, 5, 12, tzinfo=UTC), dt.datetime(2026, 11, 9, 6, tzinfo=UTC)),
            # Across local Monday midnight in summer time (Sunday 23:00 UTC).
            (
                second,
                dt.datetime(2026, 10, 11, 22, 30, tzinfo=UTC),
                dt.datetime(2026, 10, 11, 23, 45, tzinfo=UTC),
            ),
            # Inside one week, ending on a week's first instant.
            (second, dt.datetime(2026, 10, 18, 20, tzinfo=UTC), dt.datetime(2026, 10, 18, 23, tzinfo=UTC)),
        ]
        for device, a, b in spans:
            s.add(ListeningSegment(device_id=device.id, started_at=a, ended_at=b, is_open=False))
    return fresh_settings


def _load(session: Session) -> load.PilotData:
    trial = session.scalars(sa.select(Trial).where(Trial.code == "ALDER")).one()
    week = trend.week("2026-W46", trial.timezone)
    return load.load_pilot(session, trial, week, now=NOW, staged_tolerance_s=30.0)


def _readers(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Names of the threads that read monitored seconds."""
    names: list[str] = []
    original = load._monitored

    def spy(*args: Any, **kwargs: Any) -> pd.DataFrame:
        names.append(threading.current_thread().name)
        return original(*args, **kwargs)

    monkeypatch.setattr(load, "_monitored", spy)
    return names


def _monitored_by_week(data: load.PilotData) -> pd.Series:
    return data.monitored.groupby("bucket")["seconds"].sum().sort_index()


def test_week_buckets_hold_the_hour_the_clock_change_adds(pilot: Settings) -> None:
    with committed_session(pilot) as s:
        by_week = _monitored_by_week(_load(s))
    w43 = trend.week("2026-W43", "Europe/London").index
    assert by_week[w43] == pytest.approx(LONG_WEEK_S, abs=1e-3)
    assert by_week[w43 + 1] == pytest.approx(7 * 86400, abs=1e-3)
    # Week 41 (Monday 5 October): the long segment from 12:00 UTC plus the second device's 30
    # minutes before local midnight; week 42 gets its 45 minutes after it and three hours on Sunday.
    w41 = trend.week("2026-W41", "Europe/London").index
    start_w42 = dt.datetime(2026, 10, 11, 23, tzinfo=UTC)
    assert by_week[w41] == pytest.approx(
        (start_w42 - dt.datetime(2026, 10, 5, 12, tzinfo=UTC)).total_seconds() + 1800, abs=1e-3
    )
    assert by_week[w41 + 1] == pytest.approx(7 * 86400 + 2700 + 3 * 3600, abs=1e-3)
    total = (dt.datetime(2026, 11, 9, 6) - dt.datetime(2026, 10, 5, 12)).total_seconds() + 4500 + 3 * 3600
    assert by_week.sum() == pytest.approx(total, abs=1e-3)


def test_second_connection_reads_what_the_session_reads(
    pilot: Settings, backend: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    readers = _readers(monkeypatch)
    with committed_session(pilot) as s:
        alongside = _load(s)
    engine = make_engine(pilot.resolved_database_url())
    try:
        with engine.connect() as conn, Session(bind=conn) as s:  # bound to a connection: read in turn
            in_turn = _load(s)
    finally:
        engine.dispose()
    if backend.name == "postgres":
        assert readers[0] != threading.current_thread().name, "PostgreSQL reads monitored time alongside"
    else:
        assert readers[0] == threading.current_thread().name, "SQLite reads everything in turn"
    assert readers[1] == threading.current_thread().name
    pd.testing.assert_frame_equal(alongside.monitored, in_turn.monitored)
    pd.testing.assert_frame_equal(alongside.counted, in_turn.counted)


def test_a_session_that_has_written_reads_its_own_writes(
    pilot: Settings, monkeypatch: pytest.MonkeyPatch
) -> None:
    """No other connection sees uncommitted rows, so such a session reads monitored time itself."""
    readers = _readers(monkeypatch)
    with committed_session(pilot) as s:
        before = _monitored_by_week(_load(s)).sum()
        s.rollback()
        device_id = s.scalar(sa.select(ListeningSegment.device_id).order_by(ListeningSegment.id).limit(1))
        s.add(
            ListeningSegment(
                device_id=device_id,
                started_at=dt.datetime(2026, 9, 8, tzinfo=UTC),
                ended_at=dt.datetime(2026, 9, 8, 1, tzinfo=UTC),
                is_open=False,
            )
        )
        s.flush()
        after = _monitored_by_week(_load(s)).sum()
        s.rollback()
    assert after - before == pytest.approx(3600, abs=1e-3)
    assert readers[-1] == threading.current_thread().name
