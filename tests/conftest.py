"""Shared fixtures: both database backends, a transactional session per test, the app, signed-in clients.

Every API test runs on SQLite and on PostgreSQL. PostgreSQL comes from TRIALHOUSE_TEST_POSTGRES_URL
or from a private cluster started here (initdb + pg_ctl in a temporary directory on a free loopback
port, run as an unprivileged user when we are root). Locally a missing backend skips with a reason;
with CI=true it fails.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import re
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import text
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session

from server import migrate
from server.app import create_app
from server.db import make_engine
from server.deps import get_session
from server.settings import Settings
from tests import factories

IN_CI = os.environ.get("CI", "").lower() == "true"


def skip_or_fail(reason: str) -> None:
    if IN_CI:
        pytest.fail(f"CI=true and a test component is missing: {reason}", pytrace=False)
    pytest.skip(reason)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


# --- PostgreSQL ---------------------------------------------------------------------------------


def _pg_bin(name: str) -> str | None:
    found = shutil.which(name)
    if found:
        return found
    for candidate in sorted(Path("/usr/lib/postgresql").glob(f"*/bin/{name}"), reverse=True):
        return str(candidate)
    return None


class PrivateCluster:
    """A throwaway PostgreSQL cluster; stopped by its own handle at the end of the session."""

    def __init__(self) -> None:
        self.initdb, self.pg_ctl = _pg_bin("initdb"), _pg_bin("pg_ctl")
        if not (self.initdb and self.pg_ctl):
            raise RuntimeError(
                "PostgreSQL server binaries (initdb, pg_ctl) not found; install Debian's postgresql package"
            )
        self.dir = Path(tempfile.mkdtemp(prefix="trialhouse-pg-"))
        self.data = self.dir / "data"
        self.port = free_port()
        self.run_as = None
        if os.geteuid() == 0:
            self.run_as = "postgres"  # the server refuses to run as root
            shutil.chown(self.dir, user="postgres")

    def _run(self, *cmd: str) -> subprocess.CompletedProcess[str]:
        full = list(cmd)
        if self.run_as:
            full = ["runuser", "-u", self.run_as, "--", *full]
        return subprocess.run(full, capture_output=True, text=True, timeout=120, check=False)

    def start(self) -> str:
        r = self._run(
            self.initdb,
            "-D",
            str(self.data),
            "-U",
            "trialhouse",
            "--auth=trust",
            "--encoding=UTF8",
            "--no-sync",
        )
        if r.returncode:
            raise RuntimeError(f"initdb failed: {r.stderr.strip()}")
        opts = (
            f"-p {self.port} -k {self.dir} -c listen_addresses=127.0.0.1 -c fsync=off "
            "-c synchronous_commit=off -c full_page_writes=off -c max_connections=200"
        )
        r = self._run(
            self.pg_ctl,
            "-D",
            str(self.data),
            "-o",
            opts,
            "-l",
            str(self.dir / "log"),
            "-w",
            "-t",
            "60",
            "start",
        )
        if r.returncode:
            log = (self.dir / "log").read_text() if (self.dir / "log").exists() else ""
            raise RuntimeError(f"pg_ctl start failed: {r.stderr.strip()} {log[-500:]}")
        return f"postgresql+psycopg://trialhouse@127.0.0.1:{self.port}/postgres"

    def stop(self) -> None:
        self._run(self.pg_ctl, "-D", str(self.data), "-m", "immediate", "-w", "stop")
        shutil.rmtree(self.dir, ignore_errors=True)


@pytest.fixture(scope="session")
def pg_admin_url() -> Iterator[str]:
    url = os.environ.get("TRIALHOUSE_TEST_POSTGRES_URL")
    if url:
        yield url
        return
    try:
        cluster = PrivateCluster()
        admin = cluster.start()
    except (RuntimeError, OSError, subprocess.SubprocessError) as exc:
        skip_or_fail(f"no PostgreSQL for the tests: {exc}")
        return
    try:
        yield admin
    finally:
        cluster.stop()


def _pg_create(admin_url: str, name: str, template: str | None = None) -> str:
    engine = make_engine(admin_url, isolation_level="AUTOCOMMIT")
    with engine.connect() as conn:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        conn.execute(text(f'CREATE DATABASE "{name}"' + (f' TEMPLATE "{template}"' if template else "")))
    engine.dispose()
    return re.sub(r"/[^/]*$", f"/{name}", admin_url)


# --- the two backends ---------------------------------------------------------------------------


class Backend:
    """A migrated template database and a way to hand out fresh copies of it."""

    def __init__(self, name: str, template_url: str, tmp: Path, pg_admin: str | None = None) -> None:
        self.name, self.template_url, self.tmp, self.pg_admin = name, template_url, tmp, pg_admin
        self._n = 0

    def fresh_url(self) -> str:
        self._n += 1
        if self.name == "sqlite":
            src = Path(self.template_url.removeprefix("sqlite:///"))
            dst = self.tmp / f"db{self._n}.sqlite"
            shutil.copyfile(src, dst)
            return f"sqlite:///{dst}"
        assert self.pg_admin
        return _pg_create(self.pg_admin, f"trialhouse_t{os.getpid()}_{self._n}", template="trialhouse_tpl")


_backends: dict[str, Backend] = {}


def _make_backend(name: str, request: pytest.FixtureRequest, tmp_root: Path) -> Backend:
    if name in _backends:
        return _backends[name]
    tmp = tmp_root / name
    tmp.mkdir(parents=True, exist_ok=True)
    if name == "sqlite":
        url = f"sqlite:///{tmp / 'template.sqlite'}"
        backend = Backend(name, url, tmp)
    else:
        admin = request.getfixturevalue("pg_admin_url")
        url = _pg_create(admin, "trialhouse_tpl")
        backend = Backend(name, url, tmp, admin)
    engine = make_engine(url)
    migrate.upgrade(engine)
    engine.dispose()
    _backends[name] = backend
    return backend


@pytest.fixture(scope="session")
def _tmp_root(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("backends")


@pytest.fixture(scope="session", params=["sqlite", "postgres"])
def backend(request: pytest.FixtureRequest, _tmp_root: Path) -> Backend:
    return _make_backend(request.param, request, _tmp_root)


@pytest.fixture(scope="session")
def work_engine(backend: Backend) -> Iterator[Engine]:
    """One engine per backend on a work copy of the template; tests roll back everything."""
    engine = make_engine(backend.fresh_url())
    yield engine
    engine.dispose()


@pytest.fixture
def settings(tmp_path: Path, work_engine: Engine) -> Settings:
    return Settings(
        data_dir=tmp_path / "data",
        database_url=work_engine.url.render_as_string(hide_password=False),
        secret_key="test-secret-key-" + "x" * 32,
    )


@pytest.fixture
def session(work_engine: Engine) -> Iterator[Session]:
    """A session inside an outer transaction; handlers may commit, nothing leaks between tests."""
    conn = work_engine.connect()
    outer = conn.begin()
    s = Session(bind=conn, join_transaction_mode="create_savepoint", expire_on_commit=False)
    try:
        yield s
    finally:
        s.close()
        if outer.is_active:
            outer.rollback()
        conn.close()


@pytest.fixture
def app(settings: Settings, session: Session):  # type: ignore[no-untyped-def]
    application = create_app(settings)

    def _session() -> Iterator[Session]:
        yield session

    application.dependency_overrides[get_session] = _session
    return application


@pytest.fixture
def client(app) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture
def store(app):  # type: ignore[no-untyped-def]
    return app.state.clip_store


@pytest.fixture
def trial(session: Session):  # type: ignore[no-untyped-def]
    return factories.make_trial(session)


def sign_in(client: TestClient, email: str, password: str) -> TestClient:
    page = client.get("/login")
    token = re.search(r'name="csrf_token" value="([^"]+)"', page.text)
    assert token, "login page carries a CSRF token"
    r = client.post(
        "/login",
        data={"email": email, "password": password, "csrf_token": token.group(1)},
        follow_redirects=False,
    )
    assert r.status_code == 303, r.text
    return client


def csrf_of(client: TestClient, path: str = "/account") -> str:
    page = client.get(path)
    m = re.search(r'name="csrf_token" value="([^"]+)"', page.text)
    assert m, f"{path} carries a CSRF token"
    return m.group(1)


@pytest.fixture
def staff_client(app, session: Session):  # type: ignore[no-untyped-def]
    """staff_client("reviewer") -> a TestClient signed in as a new user with that role."""
    clients: list[TestClient] = []

    def make(role: str, **kw: object) -> TestClient:
        user, password = factories.make_user(session, role=role, **kw)
        c = TestClient(app, raise_server_exceptions=False)
        c.__enter__()
        clients.append(c)
        sign_in(c, user.email, password)
        c.user = user  # type: ignore[attr-defined]
        return c

    yield make
    for c in clients:
        c.__exit__(None, None, None)


# --- committed databases: concurrency, live servers, browsers --------------------------------------


@pytest.fixture
def fresh_settings(backend: Backend, tmp_path: Path) -> Settings:
    """Settings on a brand-new migrated database of the current backend (real commits)."""
    return Settings(
        data_dir=tmp_path / "live", database_url=backend.fresh_url(), secret_key="test-secret-key-" + "y" * 32
    )


class LiveServer:
    def __init__(self, settings: Settings) -> None:
        import uvicorn

        self.settings = settings
        self.app = create_app(settings)
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        config = uvicorn.Config(
            self.app, host="127.0.0.1", port=self.port, log_level="warning", access_log=False
        )
        self.server = uvicorn.Server(config)
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self) -> LiveServer:
        self.thread.start()
        deadline = time.time() + 20
        while not self.server.started:
            if time.time() > deadline or not self.thread.is_alive():
                raise RuntimeError("live server did not start")
            time.sleep(0.05)
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.should_exit = True
        self.thread.join(timeout=10)


@pytest.fixture
def live_server(tmp_path: Path) -> Iterator[LiveServer]:
    """uvicorn on a free loopback port over a fresh SQLite database in tmp_path."""
    s = Settings(data_dir=tmp_path / "srv", secret_key="live-secret-" + "z" * 32)
    from server.cli import open_db

    open_db(s)
    with LiveServer(s) as srv:
        yield srv


def chromium_path() -> str | None:
    path = os.environ.get("TRIALHOUSE_CHROMIUM") or shutil.which("chromium") or "/usr/bin/chromium"
    return path if path and Path(path).exists() else None


CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
]


@pytest.fixture(scope="session")
def browser():  # type: ignore[no-untyped-def]
    path = chromium_path()
    if path is None:
        skip_or_fail("Debian's chromium is not installed (apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        skip_or_fail("the playwright Python package is not installed")
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=path, args=CHROMIUM_ARGS, headless=True)
        yield b
        b.close()


@pytest.fixture
def page(browser):  # type: ignore[no-untyped-def]
    context = browser.new_context()
    pg = context.new_page()
    pg.console_errors = []  # type: ignore[attr-defined]
    pg.on("console", lambda m: pg.console_errors.append(m.text) if m.type == "error" else None)
    pg.on("pageerror", lambda e: pg.console_errors.append(str(e)))
    yield pg
    context.close()


def browser_sign_in(page, base_url: str, email: str, password: str) -> None:  # type: ignore[no-untyped-def]
    page.goto(f"{base_url}/login")
    page.fill("#email", email)
    page.fill("#password", password)
    with page.expect_navigation():
        page.click("button[type=submit]")


def wait_until(page, expression: str, timeout_ms: int = 10000) -> None:  # type: ignore[no-untyped-def]
    """Poll a JavaScript condition until it holds.

    Playwright's `wait_for_function` evaluates a string predicate with `eval` inside the page, which
    the pages' Content Security Policy (no 'unsafe-eval') rightly refuses once it has to poll. A
    function evaluated from the test side is not page script, so the policy stays as shipped.
    """
    deadline = time.monotonic() + timeout_ms / 1000
    while True:
        if page.evaluate(f"() => Boolean({expression})"):
            return
        if time.monotonic() > deadline:
            raise AssertionError(f"still false after {timeout_ms} ms: {expression}")
        page.wait_for_timeout(50)


@contextlib.contextmanager
def committed_session(settings: Settings) -> Iterator[Session]:
    engine = make_engine(settings.resolved_database_url())
    s = Session(bind=engine, expire_on_commit=False)
    try:
        yield s
        s.commit()
    finally:
        s.close()
        engine.dispose()


def utc(*args: int) -> dt.datetime:
    return dt.datetime(*args, tzinfo=dt.UTC)
