"""The session cookie: set at sign-in, dropped at sign-out, and cleared when it names a dead session.

The cookie carries only the session's random id (``auth/sessions.py`` keeps everything else in the
database). Page state that is not a credential (the sign-in form's token, flash messages, the
review desk's filters) rides in the separate signed ``trialhouse_ui`` cookie.
"""

from __future__ import annotations

import anyio
from starlette.datastructures import MutableHeaders
from starlette.requests import Request
from starlette.responses import Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from server.auth.sessions import COOKIE_NAME
from server.settings import Settings

UI_COOKIE_NAME = "trialhouse_ui"


def set_session_cookie(response: Response, raw: str, settings: Settings) -> None:
    response.set_cookie(
        COOKIE_NAME,
        raw,
        max_age=settings.session_max_age_s,
        path="/",
        httponly=True,
        samesite="lax",
        secure=settings.secure_cookies,
    )


def clear_session_cookie(response: Response, settings: Settings) -> None:
    response.delete_cookie(
        COOKIE_NAME, path="/", httponly=True, samesite="lax", secure=settings.secure_cookies
    )


def password_limiter(request: Request) -> anyio.CapacityLimiter:
    """Bounds the Argon2 verifications running at once in this process (made on first use, in the loop)."""
    state = request.app.state
    limiter = getattr(state, "password_limiter", None)
    if limiter is None:
        limiter = state.password_limiter = anyio.CapacityLimiter(state.settings.password_check_slots)
    return limiter


class StaleSessionCookie:
    """Pure ASGI middleware: a response to a request whose session cookie named no live session
    also deletes that cookie, so the browser stops sending it."""

    def __init__(self, app: ASGIApp, settings: Settings) -> None:
        self.app = app
        flags = "; Path=/; HttpOnly; SameSite=lax" + ("; Secure" if settings.secure_cookies else "")
        self.header = f'{COOKIE_NAME}=""; Max-Age=0; expires=Thu, 01 Jan 1970 00:00:00 GMT{flags}'.encode(
            "latin-1"
        )

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_clearing(message: Message) -> None:
            if message["type"] == "http.response.start":
                state = scope.get("state") or {}
                if state.get("clear_session_cookie"):
                    headers = MutableHeaders(scope=message)
                    if not any(v.startswith(COOKIE_NAME + "=") for v in headers.getlist("set-cookie")):
                        headers.append("set-cookie", self.header.decode("latin-1"))
            await send(message)

        await self.app(scope, receive, send_clearing)
