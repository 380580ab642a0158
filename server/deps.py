"""FastAPI dependencies: database session, settings, clip store, the signed-in staff member, CSRF."""

from __future__ import annotations

import hmac
import secrets
from collections.abc import AsyncIterator, Callable
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from server.auth import service as auth_service
from server.auth.models import User
from server.devices.clipstore import ClipStore
from server.errors import CsrfFailed, Forbidden, InvalidToken, NotSignedIn
from server.roles import CAPABILITIES
from server.settings import Settings
from server.tokens import STAFF_PREFIX

SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


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


def csrf_token(request: Request) -> str:
    token = request.session.get("csrf")
    if not token:
        token = secrets.token_urlsafe(32)
        request.session["csrf"] = token
    return token


async def _check_csrf(request: Request) -> None:
    expected = request.session.get("csrf")
    sent = request.headers.get("x-csrf-token")
    if sent is None:
        ctype = request.headers.get("content-type", "")
        if ctype.startswith(("application/x-www-form-urlencoded", "multipart/form-data")):
            form = await request.form()
            value = form.get("csrf_token")
            sent = value if isinstance(value, str) else None
    if not expected or not sent or not hmac.compare_digest(str(expected), sent):
        raise CsrfFailed("The form's security token is missing or stale; reload the page and try again.")


def _load_staff(request: Request, session: Session) -> User | None:
    auth = request.headers.get("authorization", "")
    scheme, _, value = auth.partition(" ")
    if scheme.lower() == "bearer" and value.strip().startswith(STAFF_PREFIX):
        user = auth_service.find_user_by_api_token(session, value.strip())
        if user is None:
            raise InvalidToken("The personal API token is not recognised or was revoked.")
        request.state.via_token = True
        return user
    uid = request.session.get("uid")
    if uid is None:
        return None
    user = session.get(User, uid)
    if user is None or not user.active:
        request.session.clear()
        return None
    request.state.via_token = False
    return user


async def csrf_guard(request: Request) -> None:
    """Unsafe methods over a cookie session need the session's CSRF token (form or header)."""
    if request.method in SAFE_METHODS:
        return
    scheme, _, value = request.headers.get("authorization", "").partition(" ")
    if scheme.lower() == "bearer" and value.strip().startswith(STAFF_PREFIX):
        return  # personal API token: no ambient credentials, so no CSRF
    if request.session.get("uid") is None:
        return  # not signed in: the role check answers 401
    await _check_csrf(request)


def require(capability: str) -> Callable[..., User]:
    """Dependency: the signed-in staff member holding ``capability``, else 401 or 403.

    Unsafe methods over a cookie session also need a matching CSRF token (form field
    ``csrf_token`` or header ``X-CSRF-Token``); personal API tokens need none.
    """
    if capability not in CAPABILITIES:
        raise KeyError(f"unknown capability {capability!r}")
    roles = CAPABILITIES[capability]

    def dependency(request: Request, session: DbSession, _csrf: None = Depends(csrf_guard)) -> User:
        user = _load_staff(request, session)
        if user is None:
            raise NotSignedIn("Sign in to continue.")
        if user.role not in roles:
            raise Forbidden(f"Your role ({user.role}) does not allow this.")
        request.state.user = user
        return user

    dependency.capability = capability  # type: ignore[attr-defined]
    return dependency


def staff(capability: str) -> object:
    """``user: staff("x")`` is ``Annotated[User, Depends(require("x"))]``."""
    return Annotated[User, Depends(require(capability))]
