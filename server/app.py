"""create_app(settings) -> FastAPI: routers, error handlers, sessions, engine and clip store."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import asynccontextmanager

import anyio
from fastapi import FastAPI
from starlette.middleware.sessions import SessionMiddleware

from server import errors, health, migrate
from server.admin import api as admin_api
from server.admin import pages as admin_pages
from server.analytics import api as analytics_api
from server.analytics import pages as analytics_pages
from server.auth import api as auth_api
from server.auth import pages as auth_pages
from server.auth import web as auth_web
from server.db import make_engine, make_session_factory, utcnow, writer_engine
from server.devices import api as devices_api
from server.devices import pages as devices_pages
from server.devices.clipstore import ClipStore
from server.households import api as households_api
from server.households import home_pages as households_home_pages
from server.households import installation_api as households_installation_api
from server.households import installation_pages as households_installation_pages
from server.households import pages as households_pages
from server.households.transfer import MAX_IMPORT_BYTES
from server.quota import api as quota_api
from server.quota import pages as quota_pages
from server.review import api as review_api
from server.review import pages as review_pages
from server.settings import Settings
from server.staged import api as staged_api
from server.staged import pages as staged_pages
from server.web import pages as web_pages
from server.web.guards import RequestGuard, document_error_responses
from server.web.templating import TEMPLATES_DIR, make_templates

log = logging.getLogger(__name__)

DESCRIPTION = """
Trialhouse runs pilots of in-home acoustic event detectors. Devices authenticate with
`Authorization: Bearer <token>` and post heartbeats and alert clips; staff sign in to review and report.

Every error body is `{"error": {"code": "<machine_code>", "message": "<sentence>"}}`.
The device-integration contract is written out in DEVELOPERS.md.

A detector in trial is not a certified life-safety device and never replaces a home's certified
smoke and CO alarms; clips can hold private speech, so access and retention follow the
household's consent and data-protection law.
"""


def _lower_priority() -> None:
    """Background work (review images for new clips) yields the CPU to requests: nice the thread."""
    import os
    import threading

    try:
        os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), 15)
    except (AttributeError, OSError):  # not Linux, or not permitted: run at normal priority
        pass


def create_app(settings: Settings | None = None, *, check_schema: bool = True) -> FastAPI:
    settings = settings or Settings()
    settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url())

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if check_schema:
            migrate.check_schema(engine)
        app.state.schema_revision = migrate.current_revision(engine)
        app.state.background = ThreadPoolExecutor(
            max_workers=1, thread_name_prefix="trialhouse-bg", initializer=_lower_priority
        )
        # Device writes run a few at a time: dozens of threads taking turns at the interpreter lock
        # get less done than a handful working while the rest queue (see devices/api.py).
        app.state.device_work_limiter = anyio.CapacityLimiter(settings.device_work_slots)
        # Upload spools left by a crash hold raw audio; those untouched for a while are abandoned
        # (a younger one may be another worker's upload in flight).
        for key in app.state.clip_store.remove_spools(app.state.clip_store.stale_spools()):
            log.warning("removed an upload spool left by a crash: %s", key)
        try:
            yield
        finally:
            app.state.background.shutdown(wait=True, cancel_futures=True)
            engine.dispose()

    app = FastAPI(
        title="Trialhouse",
        version="1",
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url="/docs",
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.session_factory = make_session_factory(engine)
    app.state.writer_session_factory = make_session_factory(writer_engine(engine))
    app.state.clip_store = ClipStore(settings.clip_dir)
    app.state.clip_store.ensure()
    app.state.templates = make_templates()
    # The server's clock for device time (monitored time, receipt). The demo replays weeks through it.
    app.state.clock = utcnow
    app.state.schema_revision = None
    app.state.background = None

    # The clock of sessions, personal tokens and sign-in throttling (tests move it; the demo's
    # replay of device time does not).
    app.state.auth_clock = utcnow

    errors.install_handlers(app)
    # Staff sessions live in the database (auth/sessions.py); their cookie holds only the id. This
    # signed cookie carries page state that is no credential: the sign-in form's token, flash
    # messages, desk filters. resolved_secret_key() refuses a placeholder or short key.
    app.add_middleware(
        SessionMiddleware,
        secret_key=settings.resolved_secret_key(),
        session_cookie=auth_web.UI_COOKIE_NAME,
        max_age=settings.session_max_age_s,
        same_site="lax",
        https_only=settings.secure_cookies,
    )
    app.add_middleware(auth_web.StaleSessionCookie, settings=settings)

    # Outermost: turns away credential-less staff calls and oversized bodies before anything reads them.
    import_limit = MAX_IMPORT_BYTES + 256 * 1024  # the file plus its multipart framing
    app.add_middleware(
        RequestGuard,
        routes_of=app,
        max_body_bytes=settings.max_body_bytes,
        body_limits={
            ("POST", "/api/v1/alerts"): None,  # caps its clip while streaming
            ("POST", "/api/v1/homes/import"): import_limit,
            ("POST", "/homes/import"): import_limit,
        },
        session_cookie="trialhouse_session",
        template_dir=TEMPLATES_DIR,
    )

    app.include_router(health.router)
    # The register's list pages (/homes/new, /homes/import, ...) come before /homes/{code}.
    for module in (
        auth_pages,
        auth_api,
        web_pages,
        devices_api,
        devices_pages,
        households_api,
        households_pages,
        households_home_pages,
        households_installation_api,
        households_installation_pages,
        staged_api,
        staged_pages,
        quota_api,
        quota_pages,
        review_api,
        review_pages,
        analytics_api,
        analytics_pages,
        admin_api,
        admin_pages,
    ):
        app.include_router(module.router)
    document_error_responses(app)
    return app
