"""FastAPI dependencies: database session, settings, clip store, the signed-in staff member, CSRF.

Staff are signed in by a server-side session (cookie ``trialhouse_session``, see auth/sessions.py) or a
personal API token (``Authorization: Bearer ths_...``).
"""

from __future__ import annotations

import datetime as dt
import hmac
import secrets
from collections.abc import AsyncIterator, Callable
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from server.auth import service as auth_service
from server.auth import sessions
from server.auth.models import User
from server.devices.clipstore import ClipStore
from server.errors import AppError, CsrfFailed, Forbidden, InvalidToken, NotSignedIn
from server.roles import CAPABILITIES, allowed
from server.settings import Settings
from server.tokens import STAFF_PREFIX
from server.trials import service as trials_service

SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


class TokenExpired(InvalidToken):
    code = "token_expired"


class PasswordChangeRequired(AppError):
    code, status = "password_change_required", 403


async def get_session(request: Request) -> AsyncIterator[Session]:
    """One session per request. It only opens and closes: handlers commit before they return.

    Opening a Session touches no database, and closing one that is not inside a transaction only
    drops references, so both stay on the event loop (a sync dependency would cost two thread-pool
    hops per request); a session left mid-transaction (an error path) rolls back in a worker thread.
    """
    state = request.app.state
    factory = state.session_factory if request.method in SAFE_METHODS else state.writer_session_factory
    session = factory()
    try:
        yield session
    finally:
        if session.in_transaction():
            await run_in_threadpool(session.close)
        else:
            session.close()


async def get_settings(request: Request) -> Settings:
    return request.app.state.settings  # async: nothing blocks, so no thread-pool hop


async def get_clip_store(request: Request) -> ClipStore:
    return request.app.state.clip_store


DbSession = Annotated[Session, Depends(get_session)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
ClipStoreDep = Annotated[ClipStore, Depends(get_clip_store)]


def auth_now(request: Request) -> dt.datetime:
    """The clock that sessions, tokens and sign-in throttling read (tests move it; the demo does not)."""
    return request.app.state.auth_clock()


def session_limits(settings: Settings) -> sessions.Limits:
    return sessions.Limits(
        idle_s=settings.session_idle_s, max_age_s=settings.session_max_age_s, touch_s=settings.session_touch_s
    )


def csrf_token(request: Request) -> str:
    """The form token: the signed-in session's (kept in its database row), else the sign-in form's.

    Before sign-in the token lives in the signed UI cookie: it only ties the sign-in form to the
    browser that loaded it. Signing in starts a session with a new token.
    """
    row = getattr(request.state, "web_session", None)
    if row is not None:
        return row.csrf_token
    token = request.session.get("csrf")
    if not token:
        token = secrets.token_urlsafe(32)
        request.session["csrf"] = token
    return token


def _bearer_staff_token(request: Request) -> str | None:
    scheme, _, value = request.headers.get("authorization", "").partition(" ")
    value = value.strip()
    if scheme.lower() == "bearer" and value.startswith(STAFF_PREFIX):
        return value
    return None


async def sent_csrf(request: Request) -> str | None:
    """The CSRF token an unsafe cookie-session request sent (header ``X-CSRF-Token`` or form field)."""
    if request.method in SAFE_METHODS or _bearer_staff_token(request) is not None:
        return None
    if not request.cookies.get(sessions.COOKIE_NAME):
        return None  # not signed in: the role check answers 401
    sent = request.headers.get("x-csrf-token")
    if sent is None:
        ctype = request.headers.get("content-type", "")
        if ctype.startswith(("application/x-www-form-urlencoded", "multipart/form-data")):
            form = await request.form()
            value = form.get("csrf_token")
            sent = value if isinstance(value, str) else None
    return sent if sent is not None else ""


def _record_use(session: Session, write: Callable[[], None]) -> None:
    """Write a last-seen/last-used time in its own short transaction.

    The read so far is committed first, so on SQLite the write begins a fresh transaction (no lock
    upgrade from a read snapshot); nothing else has happened in the request's session yet.
    """
    session.commit()
    write()
    session.commit()


def _load_staff(request: Request, session: Session) -> User | None:
    settings: Settings = request.app.state.settings
    now = auth_now(request)
    token = _bearer_staff_token(request)
    if token is not None:
        row = auth_service.find_api_token(session, token)
        if row is None or row.revoked or not row.user.active:
            raise InvalidToken("The personal API token is not recognised or was revoked.")
        if row.expires_at <= now:
            raise TokenExpired(
                f"The personal API token expired on {row.expires_at:%Y-%m-%d %H:%M} UTC; "
                "create a new one on your account page."
            )
        if row.last_used_at is None or (now - row.last_used_at).total_seconds() >= settings.session_touch_s:

            def write() -> None:
                row.last_used_at = now
                session.flush()

            _record_use(session, write)
        request.state.via_token = True
        request.state.web_session = None
        return row.user
    raw = request.cookies.get(sessions.COOKIE_NAME)
    if not raw:
        return None
    limits = session_limits(settings)
    found = sessions.find(session, raw, now=now, limits=limits)
    if found is None:
        request.state.clear_session_cookie = True
        return None
    if sessions.touch_due(found, now=now, limits=limits):
        _record_use(session, lambda: sessions.touch(session, found, now=now))
    request.state.via_token = False
    request.state.web_session = found
    return found.user


def current_staff(request: Request, session: Session) -> User | None:
    """The signed-in staff member (cookie session or personal token), or None; no role check."""
    return _load_staff(request, session)


def require(capability: str) -> Callable[..., User]:
    """Dependency: the signed-in staff member holding ``capability``, else 401 or 403.

    Unsafe methods over a cookie session also need the session's CSRF token (form field
    ``csrf_token`` or header ``X-CSRF-Token``); personal API tokens need none. A user whose password
    an admin chose may use only the ``staff.self`` routes (their account page) until they change it.
    """
    if capability not in CAPABILITIES:
        raise KeyError(f"unknown capability {capability!r}")

    def dependency(request: Request, session: DbSession, sent: str | None = Depends(sent_csrf)) -> User:
        user = _load_staff(request, session)
        if user is None:
            raise NotSignedIn("Sign in to continue.")
        row = request.state.web_session
        if row is not None and request.method not in SAFE_METHODS:
            if not sent or not hmac.compare_digest(row.csrf_token, sent):
                raise CsrfFailed(
                    "The form's security token is missing or stale; reload the page and try again."
                )
        request.state.user = user
        if user.must_change_password and capability != "staff.self":
            raise PasswordChangeRequired(
                "An administrator set your password: choose your own on your account page (/account) first."
            )
        if not allowed(user.role, capability):
            raise Forbidden(f"Your role ({user.role}) does not allow this.")
        trials_service.limit_session_to_user(session, user)  # trial membership, every later query
        return user

    dependency.capability = capability  # type: ignore[attr-defined]
    return dependency


def staff(capability: str) -> object:
    """``user: staff("x")`` is ``Annotated[User, Depends(require("x"))]``."""
    return Annotated[User, Depends(require(capability))]
