"""Sign-in, sign-out, and the account page (password, sessions, personal API tokens)."""

from __future__ import annotations

import hmac
from typing import Any

import anyio
from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from server.auth import service, sessions, throttle
from server.auth import web as auth_web
from server.auth.models import User
from server.auth.passwords import MAX_PASSWORD_LENGTH, verify_password
from server.deps import DbSession, SettingsDep, auth_now, require, session_limits
from server.errors import ValidationFailed
from server.settings import Settings
from server.web.templating import render

router = APIRouter(include_in_schema=False)

HOME_BY_ROLE = {"admin": "/devices", "coordinator": "/homes", "reviewer": "/review", "lead": "/summary"}
NO_STORE = {"Cache-Control": "no-store"}
TOKEN_DAY_CHOICES = (7, 30, 90, 180, 365)


def _safe_next(value: str | None, user: User) -> str:
    if (
        value
        and value.startswith("/")
        and not value.startswith("//")
        and not value.startswith("/login")
        and "\\" not in value
    ):
        return value
    return HOME_BY_ROLE.get(user.role, "/devices")


def policy(settings: Settings) -> throttle.Policy:
    return throttle.Policy(
        account_limit=settings.sign_in_account_limit,
        address_limit=settings.sign_in_address_limit,
        window_s=settings.sign_in_window_s,
        block_s=settings.sign_in_block_s,
        block_max_s=settings.sign_in_block_max_s,
    )


def client_address(request: Request) -> str | None:
    return request.client.host if request.client else None


class PasswordBusy(service.SignInBlocked):
    """Every password check slot stayed taken for ``password_wait_s``: the server is flooded."""

    code = "sign_in_busy"

    def __init__(self) -> None:
        super().__init__(5)
        self.message = "The server is busy checking other sign-ins. Wait a few seconds, then try again."


async def check_password(request: Request, password_hash: str, password: str) -> bool:
    """Verify on a worker thread, at most ``password_check_slots`` at once in this process.

    Waiting for a slot happens on the event loop and holds no thread, so a sign-in flood queues
    here instead of filling the thread pool that device calls also use.
    """
    if len(password) > MAX_PASSWORD_LENGTH:
        return False
    limiter = auth_web.password_limiter(request)
    with anyio.move_on_after(request.app.state.settings.password_wait_s) as scope:
        await limiter.acquire()
    if scope.cancelled_caught:
        raise PasswordBusy()
    try:
        return await service.run_password_work(verify_password, password_hash, password)
    finally:
        limiter.release()


def _login_page(
    request: Request,
    *,
    next: str,
    email: str,
    error: str | None,
    status: int,
    headers: dict[str, str] | None = None,
) -> Response:
    return render(
        request,
        "auth/login.html",
        {"next": next, "email": email, "error": error},
        status_code=status,
        headers=headers,
    )


@router.get("/login")
def login_form(request: Request, next: str | None = None) -> Response:
    return _login_page(request, next=next or "", email="", error=None, status=200)


@router.post("/login")
async def login(request: Request, session: DbSession, settings: SettingsDep) -> Response:
    form = await request.form()

    def field(name: str) -> str:
        value = form.get(name)
        return value if isinstance(value, str) else ""

    email, password, next_ = field("email")[:254], field("password"), field("next")[:2000]
    expected = request.session.get("csrf")
    if not expected or not hmac.compare_digest(str(expected), field("csrf_token")):
        return _login_page(
            request,
            next=next_,
            email=email,
            status=403,
            error="The sign-in form had expired; please try again.",
        )
    address, now = client_address(request), auth_now(request)

    def begin() -> service.SignInAttempt:
        try:
            return service.begin_sign_in(session, email, address, now=now)
        finally:
            session.commit()  # end the read before hashing: no lock is held while Argon2 runs

    try:
        attempt = await run_in_threadpool(begin)
        verified = await check_password(request, attempt.password_hash, password)
    except service.SignInBlocked as exc:
        return _login_page(
            request, next=next_, email=email, error=exc.message, status=429, headers=exc.headers
        )

    def finish() -> tuple[Any, str] | None:
        result = service.finish_sign_in(
            session,
            attempt,
            verified,
            now=now,
            policy=policy(settings),
            user_agent=request.headers.get("user-agent"),
            limits=session_limits(settings),
        )
        session.commit()
        return result

    started = await run_in_threadpool(finish)
    if started is None:
        return _login_page(
            request, next=next_, email=email, error="E-mail or password is not right.", status=401
        )
    row, raw = started
    request.session.clear()  # nothing from before sign-in carries over
    target = "/account" if row.user.must_change_password else _safe_next(next_, row.user)
    response = RedirectResponse(target, status_code=303)
    auth_web.set_session_cookie(response, raw, settings)
    return response


@router.post("/logout")
def logout(
    request: Request, session: DbSession, settings: SettingsDep, user: User = Depends(require("staff.self"))
) -> Response:
    row = request.state.web_session
    if row is not None:
        service.sign_out(session, row, now=auth_now(request))
        session.commit()
    request.session.clear()
    response = RedirectResponse("/login", status_code=303)
    auth_web.clear_session_cookie(response, settings)
    return response


# --- the account page ---------------------------------------------------------------------------


def _account(
    request: Request,
    session: Session,
    settings: Settings,
    user: User,
    *,
    new_token: str | None = None,
    errors: dict[str, str] | None = None,
    status: int = 200,
) -> Response:
    now = auth_now(request)
    current = request.state.web_session
    ctx = {
        "tokens": [(t, t.state(now)) for t in service.list_api_tokens(session, user.id)],
        "sessions": service.live_sessions(session, user.id, now=now, limits=session_limits(settings)),
        "current_session_id": current.id if current is not None else None,
        "new_token": new_token,
        "errors": errors or {},
        "done": request.query_params.get("done", ""),
        "day_choices": [d for d in TOKEN_DAY_CHOICES if d <= settings.api_token_max_days],
        "default_days": min(settings.api_token_days, settings.api_token_max_days),
        "idle_min": settings.session_idle_s // 60,
        "max_age_h": settings.session_max_age_s / 3600,
    }
    return render(request, "auth/account.html", ctx, status_code=status, headers=NO_STORE)


@router.get("/account")
def account(
    request: Request, session: DbSession, settings: SettingsDep, user: User = Depends(require("staff.self"))
) -> Response:
    return _account(request, session, settings, user)


@router.post("/account/tokens")
def create_token(
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    label: str = Form(""),
    days: str = Form(""),
    user: User = Depends(require("staff.self")),
) -> Response:
    try:
        n = int(days) if days.strip() else settings.api_token_days
    except ValueError:
        n = -1
    try:
        _, token = service.create_api_token(
            session, user, label, days=n, max_days=settings.api_token_max_days, now=auth_now(request)
        )
    except ValidationFailed as exc:  # raised before anything was written
        return _account(request, session, settings, user, errors=exc.errors, status=422)
    session.commit()
    return _account(request, session, settings, user, new_token=token, status=201)


@router.post("/account/tokens/{token_id}/revoke")
def revoke_token(
    request: Request, token_id: int, session: DbSession, user: User = Depends(require("staff.self"))
) -> Response:
    service.revoke_api_token(session, token_id, by=user, now=auth_now(request))
    session.commit()
    return RedirectResponse("/account?done=token-revoked", status_code=303)


@router.post("/account/sessions/end-others")
def end_other_sessions(
    request: Request, session: DbSession, user: User = Depends(require("staff.self"))
) -> Response:
    current = request.state.web_session
    ended = sessions.end_all(
        session,
        user.id,
        reason="ended_by_user",
        now=auth_now(request),
        keep_id=current.id if current is not None else None,
    )
    from server import audit

    audit.record(session, user, "auth.sessions_end", "user", user.id, {"ended": ended})
    session.commit()
    return RedirectResponse("/account?done=sessions-ended", status_code=303)


@router.post("/account/password")
async def change_password(
    request: Request, session: DbSession, settings: SettingsDep, user: User = Depends(require("staff.self"))
) -> Response:
    """Change one's own password: the current one is checked (and throttled like a sign-in), then
    every session of the user ends and this browser gets a new one."""
    form = await request.form()

    def field(name: str) -> str:
        value = form.get(name)
        return value if isinstance(value, str) else ""

    current, new, repeat = field("current_password"), field("new_password"), field("repeat_password")
    address, now = client_address(request), auth_now(request)

    def page(errors: dict[str, str], status: int) -> Response:
        return _account(request, session, settings, user, errors=errors, status=status)

    def begin() -> service.SignInAttempt:
        try:
            return service.begin_sign_in(session, user.email, address, now=now)
        finally:
            session.commit()

    try:
        attempt = await run_in_threadpool(begin)
        verified = await check_password(request, user.password_hash, current)
    except service.SignInBlocked as exc:
        return await run_in_threadpool(page, {"current_password": exc.message}, 429)
    if not verified:

        def fail() -> Response:
            throttle.record_failure(session, attempt.email, address, now=now, policy=policy(settings))
            from server import audit

            audit.record(session, user, "auth.password_change_failed", "user", user.id, {"address": address})
            session.commit()
            return page({"current_password": "That is not your current password."}, 422)

        return await run_in_threadpool(fail)
    if new != repeat:
        return await run_in_threadpool(page, {"repeat_password": "The two new passwords differ."}, 422)
    if new == current:
        return await run_in_threadpool(
            page, {"new_password": "Choose a password other than the current one."}, 422
        )
    try:
        service.check_password_rule(new)
    except ValidationFailed as exc:
        return await run_in_threadpool(page, exc.errors, 422)

    def apply() -> str:
        service.set_password(session, user, new, now=now)
        row, raw = sessions.start(
            session, user, now=now, user_agent=request.headers.get("user-agent"), client_addr=address
        )
        session.commit()
        request.state.web_session = row
        return raw

    result = await run_in_threadpool(apply)
    response = RedirectResponse("/account?done=password", status_code=303)
    auth_web.set_session_cookie(response, result, settings)
    return response
