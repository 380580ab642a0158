"""Declarative base, the UTC datetime type, engine and session factories.

Dialect-specific code lives here and nowhere else.
"""

from __future__ import annotations

import datetime as dt
import os
import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any, ClassVar

from sqlalchemy import JSON, DateTime, MetaData, Table, create_engine, event
from sqlalchemy.engine import Engine
from sqlalchemy.orm import DeclarativeBase, Session, sessionmaker
from sqlalchemy.types import TypeDecorator

NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {dict[str, Any]: JSON, list[str]: JSON, list[dict[str, Any]]: JSON}

    if TYPE_CHECKING:
        # Every model is declared with __tablename__, so it is mapped to a Table; SQLAlchemy's
        # stubs allow any FromClause, which insert() and update() do not take.
        __table__: ClassVar[Table]


SQLITE_BUSY_TIMEOUT_S = 30.0


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class UTCDateTime(TypeDecorator[dt.datetime]):
    """Aware datetimes in, aware UTC datetimes out, on SQLite (which drops offsets) and PostgreSQL."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTCDateTime column")
        value = value.astimezone(dt.UTC)
        if dialect.name == "sqlite":
            return value.replace(tzinfo=None)
        return value

    def process_result_value(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.UTC)
        return value.astimezone(dt.UTC)


class _SQLiteConnection(sqlite3.Connection):
    """A pysqlite connection whose write transactions queue on a lock in this process.

    SQLite lets one writer in at a time and makes the others poll with growing sleeps (up to
    100 ms each), so under concurrent ingest most of the wait is sleeping after the lock was
    already free. Writers of this process wait on a lock instead and are woken the moment it is
    released; other processes still meet SQLite's own lock and busy timeout.
    """

    _writer_locks: dict[str, threading.Lock] = {}
    _guard = threading.Lock()
    _held: threading.Lock | None = None  # the writer lock this connection holds, if any

    def acquire_writer(self, database: str, timeout_s: float) -> None:
        with self._guard:
            lock = self._writer_locks.setdefault(database, threading.Lock())
        # On a timeout (this thread already holds a write transaction elsewhere, say) carry on
        # without it: SQLite's busy timeout then decides, as it would without the lock.
        if lock.acquire(timeout=timeout_s):
            self._held = lock

    def release_writer(self) -> None:
        lock, self._held = self._held, None
        if lock is not None:
            lock.release()

    def commit(self) -> None:
        try:
            super().commit()
        finally:
            self.release_writer()

    def rollback(self) -> None:
        try:
            super().rollback()
        finally:
            self.release_writer()

    def close(self) -> None:
        try:
            super().close()
        finally:
            self.release_writer()


def make_engine(url: str, **kw: Any) -> Engine:
    if url.startswith("sqlite"):
        engine = create_engine(
            url,
            connect_args={
                "timeout": SQLITE_BUSY_TIMEOUT_S,
                "check_same_thread": False,
                "factory": _SQLiteConnection,
            },
            **kw,
        )
        _configure_sqlite(engine)
        _private_file(engine.url.database)
        return engine
    if url.startswith("postgresql://"):
        url = "postgresql+psycopg://" + url[len("postgresql://") :]
    return create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=40, **kw)


def _private_file(database: str | None) -> None:
    """Create the SQLite file readable by its owner only (0600), or make an existing one so.

    It holds contact details. SQLite creates the -wal and -shm files with the database file's
    permissions, so those follow.
    """
    if not database or database == ":memory:" or database.startswith("file:"):
        return
    path = Path(database)
    try:
        if not path.exists():
            path.parent.mkdir(parents=True, exist_ok=True)
            os.close(os.open(path, os.O_WRONLY | os.O_CREAT, 0o600))  # an empty file is an empty database
        for each in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
            if each.exists() and each.stat().st_mode & 0o077:
                each.chmod(0o600)
    except OSError:  # a read-only location or someone else's file: SQLite reports it on connect
        pass


def _configure_sqlite(engine: Engine) -> None:
    # The documented pysqlite workaround: let SQLAlchemy emit BEGIN itself so that SAVEPOINT
    # and transactional DDL behave. Writes begin IMMEDIATE (taking the write lock up front), so a
    # read-then-write transaction never fails on a lock upgrade under concurrent ingest.
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA foreign_keys=ON")
        # Deleted rows are overwritten with zeros, so erased personal data does not stay readable
        # in free pages of the database file (the erasure also truncates the write-ahead log).
        cur.execute("PRAGMA secure_delete=ON")
        cur.execute("PRAGMA journal_mode=WAL")
        # FULL: a commit that returned has survived a power cut (WAL is fsynced on commit).
        cur.execute("PRAGMA synchronous=FULL")
        cur.execute(f"PRAGMA busy_timeout={int(SQLITE_BUSY_TIMEOUT_S * 1000)}")
        cur.close()

    database = engine.url.database or ":memory:"

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        if conn.get_execution_options().get("sqlite_immediate"):
            dbapi_conn = conn.connection.driver_connection
            if isinstance(dbapi_conn, _SQLiteConnection):
                dbapi_conn.acquire_writer(database, SQLITE_BUSY_TIMEOUT_S)
            try:
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            except BaseException:
                if isinstance(dbapi_conn, _SQLiteConnection):
                    dbapi_conn.release_writer()
                raise
        else:
            conn.exec_driver_sql("BEGIN")


def writer_engine(engine: Engine) -> Engine:
    """The same pool, with write transactions taking SQLite's lock at BEGIN (no-op elsewhere)."""
    return engine.execution_options(sqlite_immediate=True)


def begin_write(session: Session) -> None:
    """Make the rest of a GET's work one write transaction (it also writes: an audit row).

    On SQLite a transaction that began as a read and then writes fails with "database is locked"
    whenever another connection committed in between (its snapshot is stale), so under device
    uploads a personal-data view would fail now and then. Here the reads made so far (the caller
    check) are committed and a transaction that takes the write lock up front (BEGIN IMMEDIATE) is
    begun. No effect on PostgreSQL, or on a session bound to a connection (tests).
    """
    if not isinstance(session.get_bind(), Engine) or session.get_bind().dialect.name != "sqlite":
        return
    if session.in_transaction():
        session.commit()
    session.connection(execution_options={"sqlite_immediate": True})


def make_session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(bind=engine, expire_on_commit=False, autoflush=True)


@contextmanager
def session_scope(factory: sessionmaker[Session]) -> Iterator[Session]:
    """A session that commits on success and rolls back on error (CLI and scripts)."""
    session = factory()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


def is_sqlite(session_or_engine: Session | Engine) -> bool:
    bind = session_or_engine.get_bind() if isinstance(session_or_engine, Session) else session_or_engine
    return bind.dialect.name == "sqlite"


def seconds_between(dialect_name: str, later: Any, earlier: Any) -> Any:
    """SQL expression: seconds from ``earlier`` to ``later`` (two datetime columns)."""
    from sqlalchemy import func

    if dialect_name == "sqlite":
        return (func.julianday(later) - func.julianday(earlier)) * 86400.0
    return func.extract("epoch", later - earlier)


def sql_greatest(dialect_name: str, *args: Any) -> Any:
    from sqlalchemy import func

    return func.max(*args) if dialect_name == "sqlite" else func.greatest(*args)


def sql_least(dialect_name: str, *args: Any) -> Any:
    from sqlalchemy import func

    return func.min(*args) if dialect_name == "sqlite" else func.least(*args)
