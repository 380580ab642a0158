"""Application errors and the handlers that render every error body.

Every error leaves the server as ``{"error": {"code": ..., "message": ...}}``; page URLs
render the same through ``error.html``. Services raise ``AppError`` subclasses and never
see HTTP objects.
"""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, JSONResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.requests import ClientDisconnect

log = logging.getLogger(__name__)


class AppError(Exception):
    """An error with a stable machine code, an HTTP status and a sentence a person can act on."""

    code = "app_error"
    status = 400

    def __init__(self, message: str, *, code: str | None = None, status: int | None = None,
                 field: str | None = None, headers: dict[str, str] | None = None) -> None:
        super().__init__(message)
        self.message = message
        if code is not None:
            self.code = code
        if status is not None:
            self.status = status
        self.field = field
        self.headers = headers or {}


class MissingToken(AppError):
    code, status = "missing_token", 401

    def __init__(self, message: str = "This call needs an 'Authorization: Bearer <token>' header.") -> None:
        super().__init__(message, headers={"WWW-Authenticate": "Bearer"})


class InvalidToken(AppError):
    code, status = "invalid_token", 401

    def __init__(self, message: str = "The bearer token is not recognised.") -> None:
        super().__init__(message, headers={"WWW-Authenticate": 'Bearer error="invalid_token"'})


class DeviceRevoked(AppError):
    code, status = "device_revoked", 403


class NotSignedIn(AppError):
    code, status = "not_signed_in", 401

    def __init__(self, message: str = "Sign in to continue.", **kw: Any) -> None:
        # RFC 9110 section 15.5.2: a 401 names a scheme; the staff API takes personal bearer tokens.
        kw.setdefault("headers", {"WWW-Authenticate": "Bearer"})
        super().__init__(message, **kw)


class Forbidden(AppError):
    code, status = "forbidden", 403


class CsrfFailed(AppError):
    code, status = "csrf_failed", 403


class NotFound(AppError):
    code, status = "not_found", 404


class Conflict(AppError):
    code, status = "conflict", 409


class EventIdConflict(AppError):
    code, status = "event_id_conflict", 409


class ClipTooLarge(AppError):
    code, status = "clip_too_large", 413


class NotMultipart(AppError):
    code, status = "not_multipart", 415


class MalformedMultipart(AppError):
    code, status = "malformed_multipart", 400


class InvalidRequest(AppError):
    code, status = "invalid_request", 422


class InvalidMeta(AppError):
    code, status = "invalid_meta", 422


class UnknownSoundClass(AppError):
    code, status = "unknown_sound_class", 422


class UnsupportedAudio(AppError):
    code, status = "unsupported_audio", 422


class UnsupportedChannels(AppError):
    code, status = "unsupported_channels", 422


class UnreadableAudio(AppError):
    code, status = "unreadable_audio", 422


class ClipDigestMismatch(AppError):
    code, status = "clip_digest_mismatch", 422


class ValidationFailed(AppError):
    """A form or API body failed a business rule; ``errors`` maps field names to sentences."""

    code, status = "validation_failed", 422

    def __init__(self, message: str, errors: dict[str, str] | None = None, **kw: Any) -> None:
        super().__init__(message, **kw)
        self.errors = errors or {}


class IllegalTransition(AppError):
    code, status = "illegal_transition", 409


def error_body(code: str, message: str, **extra: Any) -> dict[str, Any]:
    body: dict[str, Any] = {"code": code, "message": message}
    body.update({k: v for k, v in extra.items() if v is not None})
    return {"error": body}


def _wants_html(request: Request) -> bool:
    path = request.url.path
    if path.startswith("/api/") or path in ("/openapi.json",) or path.startswith("/docs"):
        return False
    return "text/html" in request.headers.get("accept", "") or request.method == "GET"


def render_error(request: Request, status: int, code: str, message: str,
                 headers: dict[str, str] | None = None, **extra: Any) -> Response:
    if _wants_html(request):
        templates = getattr(request.app.state, "templates", None)
        if templates is not None:
            try:
                return templates.TemplateResponse(
                    request, "error.html",
                    {"status": status, "code": code, "message": message},
                    status_code=status, headers=headers,
                )
            except Exception:  # pragma: no cover - the plain body below still answers
                log.exception("error page failed to render")
        return HTMLResponse(f"<h1>{status}</h1><p>{message}</p>", status_code=status, headers=headers)
    return JSONResponse(error_body(code, message, **extra), status_code=status, headers=headers)


_HTTP_CODES = {
    400: "bad_request", 401: "not_signed_in", 403: "forbidden", 404: "not_found",
    405: "method_not_allowed", 406: "not_acceptable", 413: "request_too_large",
    415: "unsupported_media_type", 416: "range_not_satisfiable", 422: "invalid_request",
    429: "too_many_requests",
}


def install_handlers(app: FastAPI) -> None:
    @app.exception_handler(AppError)
    async def _app_error(request: Request, exc: AppError) -> Response:
        extra: dict[str, Any] = {}
        if exc.field:
            extra["field"] = exc.field
        if isinstance(exc, ValidationFailed) and exc.errors:
            extra["fields"] = exc.errors
        if exc.status == 401 and request.url.path.startswith("/api/") is False and _wants_html(request):
            from fastapi.responses import RedirectResponse
            return RedirectResponse(f"/login?next={request.url.path}", status_code=303)
        return render_error(request, exc.status, exc.code, exc.message, exc.headers or None, **extra)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> Response:
        errs = exc.errors()
        first = errs[0] if errs else {}
        loc = ".".join(str(p) for p in first.get("loc", ()) if p not in ("body", "query", "path"))
        msg = first.get("msg", "invalid request")
        message = f"Field '{loc}': {msg}." if loc else f"{msg}."
        return render_error(request, 422, "invalid_request", message, field=loc or None)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> Response:
        code = _HTTP_CODES.get(exc.status_code, "http_error")
        detail = exc.detail if isinstance(exc.detail, str) else code.replace("_", " ")
        if exc.status_code == 404 and detail == "Not Found":
            detail = f"Nothing lives at {request.url.path}."
        if exc.status_code == 405:
            detail = f"{request.method} is not allowed on {request.url.path}."
        return render_error(request, exc.status_code, code, detail, getattr(exc, "headers", None))

    @app.exception_handler(ClientDisconnect)
    async def _gone(request: Request, exc: ClientDisconnect) -> Response:
        # The client hung up mid-body (a device losing its link mid-upload): nothing was stored and
        # nobody reads the answer, so this is not a server error.
        log.info("client disconnected during %s %s", request.method, request.url.path)
        return render_error(request, 400, "client_disconnected", "The request body ended early: the client went away.")

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> Response:
        log.exception("unhandled error on %s %s", request.method, request.url.path)
        return render_error(request, 500, "internal_error",
                            "Something went wrong on the server; the error was logged.")
