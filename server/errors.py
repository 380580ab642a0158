"""Application errors and the handlers that render every error body.

Every error leaves the server as ``{"error": {"code": ..., "message": ...}}``; page URLs
render the same through ``error.html``. Services raise ``AppError`` subclasses and never
see HTTP objects.
"""

from __future__ import annotations

import errno
import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, JSONResponse, Response
from pydantic import BaseModel
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.requests import ClientDisconnect

log = logging.getLogger(__name__)


class AppError(Exception):
    """An error with a stable machine code, an HTTP status and a sentence a person can act on."""

    code = "app_error"
    status = 400

    def __init__(
        self,
        message: str,
        *,
        code: str | None = None,
        status: int | None = None,
        field: str | None = None,
        headers: dict[str, str] | None = None,
    ) -> None:
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


class BodyTooLarge(AppError):
    code, status = "body_too_large", 413


class StorageFault(AppError):
    """The server cannot store anything just now (full disk, read-only database, clip store gone).

    503 with Retry-After: nothing was stored, and the same request may succeed later.
    """

    status = 503
    RETRY_AFTER_S = 60

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message, code=code, headers={"Retry-After": str(self.RETRY_AFTER_S)})


# SQLite primary result codes (https://www.sqlite.org/rescode.html) and PostgreSQL SQLSTATEs
# (PostgreSQL manual, appendix A) that say "storage", not "bug".
_SQLITE_BUSY, _SQLITE_LOCKED, _SQLITE_READONLY, _SQLITE_IOERR, _SQLITE_FULL = 5, 6, 8, 10, 13
_PG_DISK_FULL, _PG_READ_ONLY = ("53100", "53000"), ("25006",)


def storage_fault(exc: BaseException) -> StorageFault | None:
    """The StorageFault a low-level error means, or None when it is not a storage condition."""
    orig = getattr(exc, "orig", None) or exc
    sqlite_code = getattr(orig, "sqlite_errorcode", None)
    sqlstate = getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None)
    text = str(orig).lower()
    if sqlite_code is not None:
        primary = sqlite_code & 0xFF
        if primary == _SQLITE_FULL:
            return StorageFault("storage_full", "The database's disk is full; nothing was stored.")
        if primary == _SQLITE_READONLY:
            return StorageFault(
                "database_read_only", "The database accepts no writes just now; nothing was stored."
            )
        if primary in (_SQLITE_BUSY, _SQLITE_LOCKED):
            return StorageFault("database_busy", "The database is busy; nothing was stored. Try again.")
        if primary == _SQLITE_IOERR:
            return StorageFault(
                "storage_full" if "full" in text else "database_unavailable",
                "The database could not write to its disk; nothing was stored.",
            )
        return None
    if sqlstate is not None:
        if sqlstate in _PG_DISK_FULL:
            return StorageFault("storage_full", "The database's disk is full; nothing was stored.")
        if sqlstate in _PG_READ_ONLY:
            return StorageFault(
                "database_read_only", "The database accepts no writes just now; nothing was stored."
            )
        if sqlstate.startswith("08") or sqlstate in ("57P01", "57P02", "57P03"):
            return StorageFault("database_unavailable", "The database cannot be reached just now.")
        return None
    if isinstance(orig, OSError):
        if orig.errno in (errno.ENOSPC, errno.EDQUOT):
            return StorageFault("storage_full", "The disk is full; nothing was stored.")
        if orig.errno in (errno.EROFS, errno.EACCES, errno.EPERM, errno.EIO):
            return StorageFault(
                "clip_store_unavailable", "The clip store cannot be written just now; nothing was stored."
            )
    return None


def input_fault(exc: BaseException) -> AppError | None:
    """A 422 for input the database cannot hold (a number out of range, text it cannot encode)."""
    orig = getattr(exc, "orig", None) or exc
    sqlstate = getattr(orig, "sqlstate", None)
    if isinstance(orig, RecursionError):
        return InvalidRequest("The request nests too deeply to read.")
    if isinstance(orig, OverflowError) or sqlstate in ("22003", "22008"):
        return InvalidRequest("A number or date in the request is out of range.")
    if isinstance(orig, UnicodeError) or sqlstate in ("22021", "22P05"):
        return InvalidRequest("Text in the request is not valid Unicode (a lone surrogate or a NUL).")
    if sqlstate is not None and sqlstate.startswith("22"):
        return InvalidRequest("A value in the request does not fit its field.")
    if type(orig).__name__ == "DataError" and "nul" in str(orig).lower():
        return InvalidRequest("Text in the request holds a NUL character.")
    return None


class ErrorDetail(BaseModel):
    code: str
    message: str
    field: str | None = None
    fields: dict[str, str] | None = None


class ErrorBody(BaseModel):
    """Every error response: ``{"error": {"code", "message"}}`` (OpenAPI documentation only)."""

    error: ErrorDetail


def error_body(code: str, message: str, **extra: Any) -> dict[str, Any]:
    body: dict[str, Any] = {"code": code, "message": message}
    body.update({k: v for k, v in extra.items() if v is not None})
    return {"error": body}


def _printable(text: str) -> str:
    """Text safe to encode as UTF-8: a lone surrogate echoed from the input becomes '?'."""
    return text if text.isascii() else text.encode("utf-8", "replace").decode("utf-8")


def _wants_html(request: Request) -> bool:
    path = request.url.path
    if path.startswith("/api/") or path in ("/openapi.json",) or path.startswith("/docs"):
        return False
    return "text/html" in request.headers.get("accept", "") or request.method == "GET"


def render_error(
    request: Request,
    status: int,
    code: str,
    message: str,
    headers: dict[str, str] | None = None,
    **extra: Any,
) -> Response:
    message = _printable(message)
    if _wants_html(request):
        templates = getattr(request.app.state, "templates", None)
        if templates is not None:
            try:
                return templates.TemplateResponse(
                    request,
                    "error.html",
                    {"status": status, "code": code, "message": message},
                    status_code=status,
                    headers=headers,
                )
            except Exception:  # pragma: no cover - the plain body below still answers
                log.exception("error page failed to render")
        return HTMLResponse(f"<h1>{status}</h1><p>{message}</p>", status_code=status, headers=headers)
    return JSONResponse(error_body(code, message, **extra), status_code=status, headers=headers)


_HTTP_CODES = {
    400: "bad_request",
    401: "not_signed_in",
    403: "forbidden",
    404: "not_found",
    405: "method_not_allowed",
    406: "not_acceptable",
    413: "request_too_large",
    415: "unsupported_media_type",
    416: "range_not_satisfiable",
    422: "invalid_request",
    429: "too_many_requests",
}


def app_error_response(request: Request, exc: AppError) -> Response:
    """The response for an AppError: JSON, ``error.html``, or for a page's 401 the sign-in redirect."""
    extra: dict[str, Any] = {}
    if exc.field:
        extra["field"] = _printable(exc.field)
    if isinstance(exc, ValidationFailed) and exc.errors:
        extra["fields"] = {_printable(k): _printable(v) for k, v in exc.errors.items()}
    if exc.status == 401 and request.url.path.startswith("/api/") is False and _wants_html(request):
        from urllib.parse import quote

        from fastapi.responses import RedirectResponse

        return RedirectResponse(f"/login?next={quote(request.url.path)}", status_code=303)
    return render_error(request, exc.status, exc.code, exc.message, exc.headers or None, **extra)


# What a field of a query or form should hold, for fields whose check is a pattern.
FIELD_HINTS = {
    "week": "an ISO week such as 2026-W48",
    "month": "a month such as 2026-11",
    "date": "a date such as 2026-11-20",
}


def validation_sentence(error: Any, loc: str, *, for_page: bool) -> str:
    """One plain sentence for the first thing wrong with a request (no pattern or validator text).

    Pages always get a sentence of ours; the JSON API keeps the validator's own short message for
    kinds of error not named here (they read plainly there, e.g. "Input should be a valid integer").
    """
    kind = str(error.get("type", ""))
    ctx = error.get("ctx") or {}
    value = error.get("input")
    name = f"'{loc}'" if loc else "The request"
    shown = (
        f"'{value}'" if isinstance(value, str | int | float) and len(str(value)) <= 60 else "The value given"
    )
    if kind == "missing":
        return f"{name} is required."
    if kind == "string_pattern_mismatch":
        hint = FIELD_HINTS.get(loc.rsplit(".", 1)[-1])
        return f"{shown} is not a valid {loc or 'value'}" + (f": give {hint}." if hint else ".")
    if kind in ("int_parsing", "int_type", "int_from_float"):
        return f"{name} must be a whole number."
    if kind in ("float_parsing", "float_type"):
        return f"{name} must be a number."
    if kind in ("bool_parsing", "bool_type"):
        return f"{name} must be yes or no (true or false)."
    if kind.startswith("date_") or kind == "date_type":
        return f"{name} must be a date as YYYY-MM-DD."
    if kind.startswith("datetime_") or kind == "datetime_type":
        return f"{name} must be a date and time in ISO 8601 with its offset, such as 2026-11-20T14:03:05Z."
    if kind == "string_too_long":
        return f"{name} is too long: at most {ctx.get('max_length')} characters."
    if kind == "string_too_short":
        return f"{name} is too short: at least {ctx.get('min_length')} characters."
    bounds = {
        "greater_than_equal": ("at least", "ge"),
        "greater_than": ("more than", "gt"),
        "less_than_equal": ("at most", "le"),
        "less_than": ("less than", "lt"),
    }
    if kind in bounds:
        words, key = bounds[kind]
        return f"{name} must be {words} {ctx.get(key)}."
    if kind in ("enum", "literal_error"):
        return f"{name} must be one of {ctx.get('expected', 'the listed values')}."
    if for_page:
        return f"{name} is not valid here."
    msg = str(error.get("msg", "invalid request"))
    return f"Field {name}: {msg}." if loc else f"{msg}."


def install_handlers(app: FastAPI) -> None:
    from sqlalchemy.exc import DBAPIError, StatementError

    @app.exception_handler(AppError)
    async def _app_error(request: Request, exc: AppError) -> Response:
        if isinstance(exc, StorageFault):
            log.warning("storage fault on %s %s: %s", request.method, request.url.path, exc.code)
        return app_error_response(request, exc)

    async def _fault(request: Request, exc: Exception) -> Response:
        # Handled here rather than by the catch-all: the catch-all re-raises after answering, and
        # the server then drops the connection; a storage fault or bad value must leave it usable.
        known = storage_fault(exc) or input_fault(exc)
        if known is None:
            return await _unexpected(request, exc)
        if isinstance(known, StorageFault):
            log.warning(
                "storage fault on %s %s: %s (%s)",
                request.method,
                request.url.path,
                known.code,
                type(getattr(exc, "orig", None) or exc).__name__,
            )
        return app_error_response(request, known)

    for kind in (DBAPIError, StatementError, OSError, OverflowError, UnicodeError, RecursionError):
        app.add_exception_handler(kind, _fault)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> Response:
        errs = exc.errors()
        first = errs[0] if errs else {}
        loc = ".".join(str(p) for p in first.get("loc", ()) if p not in ("body", "query", "path"))
        message = validation_sentence(first, loc, for_page=_wants_html(request))
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
        return render_error(
            request, 400, "client_disconnected", "The request body ended early: the client went away."
        )

    async def _unexpected(request: Request, exc: Exception) -> Response:
        log.error("unhandled error on %s %s", request.method, request.url.path, exc_info=exc)
        return render_error(
            request, 500, "internal_error", "Something went wrong on the server; the error was logged."
        )

    app.add_exception_handler(Exception, _unexpected)
