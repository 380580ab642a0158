"""Request guard: an ASGI middleware that runs before routing and before any body is read.

It turns away a staff request that carries no credential at all, caps every request body while it
streams, and adds the security and caching headers to every response. It reads no database.
"""

from __future__ import annotations

import base64
import hashlib
import logging
import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from starlette.datastructures import MutableHeaders
from starlette.requests import Request
from starlette.routing import compile_path
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from server import errors

log = logging.getLogger(__name__)

# Paths whose pages load their own scripts (the interactive API description): no policy of ours.
_NO_POLICY_PREFIXES = ("/docs",)

_SCRIPT_BLOCK = re.compile(r"<script(?P<attrs>[^>]*)>(?P<body>.*?)</script>", re.S | re.I)
_HANDLER_ATTR = re.compile(r"""\son[a-z]+="(?P<js>[^"]*)\"""", re.I)
_JINJA = re.compile(r"\{[{%#]")


def _sha256_source(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode() + "'"


def inline_script_hashes(template_dir: Path) -> tuple[list[str], list[str]]:
    """Hashes of the static inline scripts and inline event handlers in the page templates.

    Only text without template syntax can be hashed ahead of time; a dynamic inline script is
    reported, and the browser will refuse it (so the browser tests catch it). Returns
    (script hashes, handler hashes).
    """
    scripts: set[str] = set()
    handlers: set[str] = set()
    for path in sorted(template_dir.rglob("*.html")):
        text = path.read_text(encoding="utf-8")
        for m in _SCRIPT_BLOCK.finditer(text):
            attrs = m.group("attrs").lower()
            if "src=" in attrs or ("type=" in attrs and "javascript" not in attrs and "module" not in attrs):
                continue  # external file, or a data block (type="application/json") that never runs
            if _JINJA.search(m.group("body")):
                log.warning("inline script in %s holds template syntax; the page policy refuses it", path)
                continue
            scripts.add(_sha256_source(m.group("body")))
        for m in _HANDLER_ATTR.finditer(text):
            if not _JINJA.search(m.group("js")):
                handlers.add(_sha256_source(m.group("js")))
    return sorted(scripts), sorted(handlers)


def content_security_policy(template_dir: Path) -> str:
    """The pages' policy: everything from this origin; inline scripts only by hash.

    Styles allow inline text: the templates build style blocks from partials and set widths of bars
    in ``style`` attributes, and CSS cannot run code. Scripts, the part that matters, run only from
    this origin or as one of the hashed inline texts of the templates.
    """
    scripts, handlers = inline_script_hashes(template_dir)
    script_src = ["'self'", *scripts]
    if handlers:
        script_src += ["'unsafe-hashes'", *handlers]
    directives = [
        "default-src 'self'",
        "script-src " + " ".join(script_src),
        "style-src 'self' 'unsafe-inline'",
        "img-src 'self' data:",
        "media-src 'self'",
        "connect-src 'self'",
        "object-src 'none'",
        "base-uri 'none'",
        "form-action 'self'",
        "frame-ancestors 'none'",
    ]
    return "; ".join(directives)


@dataclass(frozen=True)
class _Route:
    methods: frozenset[str]
    regex: re.Pattern[str]


def _iter_routes(routes: Iterable[Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    """(full path, route) for every route, through included routers of any FastAPI version."""
    for r in routes:
        original = getattr(r, "original_router", None)
        if original is not None:
            ctx = getattr(r, "include_context", None)
            yield from _iter_routes(original.routes, prefix + (getattr(ctx, "prefix", "") or ""))
        elif hasattr(r, "path"):
            yield prefix + r.path, r


def _needs_capability(route: Any) -> bool:
    """True when the route depends on ``require(<capability>)`` (a staff route)."""
    dependant = getattr(route, "dependant", None)
    stack = [dependant] if dependant is not None else []
    while stack:
        d = stack.pop()
        for dep in d.dependencies:
            if getattr(dep.call, "capability", None) is not None:
                return True
            stack.append(dep)
    return False


def staff_routes(app: Any) -> list[_Route]:
    found = []
    for path, route in _iter_routes(app.routes):
        if _needs_capability(route):
            regex, _, _ = compile_path(path)
            found.append(_Route(frozenset(getattr(route, "methods", None) or ()), regex))
    return found


class RequestGuard:
    """Pure ASGI middleware (no per-chunk task hop, which would slow device uploads).

    ``routes_of`` is the FastAPI app whose staff routes are guarded (read at the first request,
    after every router is included). ``body_limits`` maps (method, path) to a limit in bytes, or
    to None for a route that caps its own body while streaming (device alert clips).
    """

    SECURITY_HEADERS = (
        ("x-content-type-options", "nosniff"),
        ("x-frame-options", "DENY"),
        ("referrer-policy", "same-origin"),
    )

    def __init__(
        self,
        app: ASGIApp,
        *,
        routes_of: Any,
        max_body_bytes: int,
        body_limits: dict[tuple[str, str], int | None] | None = None,
        session_cookie: str = "trialhouse_session",
        template_dir: Path | None = None,
    ) -> None:
        self.app = app
        self.routes_of = routes_of
        self.max_body_bytes = max_body_bytes
        self.body_limits = dict(body_limits or {})
        self.session_cookie = session_cookie
        self.csp = content_security_policy(template_dir) if template_dir is not None else None
        self._staff: list[_Route] | None = None

    def _is_staff(self, method: str, path: str) -> bool:
        if self._staff is None:
            self._staff = staff_routes(self.routes_of)
        return any(method in r.methods and r.regex.match(path) for r in self._staff)

    def _has_credential(self, scope: Scope) -> bool:
        prefix = self.session_cookie.encode() + b"="
        for name, value in scope.get("headers", ()):
            if name == b"authorization" and value.strip():
                return True
            if name == b"cookie" and any(part.strip().startswith(prefix) for part in value.split(b";")):
                return True
        return False

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        method, path = scope["method"], scope["path"]
        headers_out = self._headers_for(path)

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                for name, value in headers_out:
                    headers.setdefault(name, value)
            await send(message)

        # A staff route with no credential at all: answer before a byte of the body is read.
        if self._is_staff(method, path) and not self._has_credential(scope):
            await self._reply(scope, send_with_headers, errors.NotSignedIn("Sign in to continue."))
            return

        limit = self.body_limits.get((method, path), self.max_body_bytes)
        if limit is None or method in ("GET", "HEAD", "OPTIONS"):
            await self.app(scope, receive, send_with_headers)
            return
        declared = _content_length(scope)
        if declared is not None and declared > limit:
            await self._reply(scope, send_with_headers, _too_large(limit, declared))
            return

        state = {"read": 0, "over": False, "started": False}

        async def counting_receive() -> Message:
            message = await receive()
            if message["type"] == "http.request":
                state["read"] += len(message.get("body", b""))
                if state["read"] > limit:
                    state["over"] = True
                    raise _too_large(limit, None)
            return message

        async def send_or_replace(message: Message) -> None:
            # Whatever the app made of the cut-off body (a parse error, say), the answer is 413.
            if state["over"] and not state["started"]:
                if message["type"] == "http.response.start":
                    state["started"] = True
                    await self._reply(scope, send_with_headers, _too_large(limit, None))
                return
            if state["over"] and message["type"] == "http.response.body":
                return
            state["started"] = state["started"] or message["type"] == "http.response.start"
            await send_with_headers(message)

        try:
            await self.app(scope, counting_receive, send_or_replace)
        except errors.BodyTooLarge:
            if state["started"]:
                raise
            state["started"] = True
            await self._reply(scope, send_with_headers, _too_large(limit, None))

    def _headers_for(self, path: str) -> list[tuple[str, str]]:
        out = list(self.SECURITY_HEADERS)
        # Pages and staff JSON carry personal data and fresh tokens: no cache keeps a copy.
        out.append(("cache-control", "no-store"))
        if self.csp and not path.startswith(_NO_POLICY_PREFIXES):
            out.append(("content-security-policy", self.csp))
        return out

    async def _reply(self, scope: Scope, send: Send, exc: errors.AppError) -> None:
        async def no_body() -> Message:  # the body is never read
            return {"type": "http.disconnect"}

        request = Request(scope, no_body)
        response = errors.app_error_response(request, exc)
        await response(scope, no_body, send)


def _content_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            text = value.decode("latin-1").strip()
            return int(text) if text.isdigit() and len(text) < 20 else None
    return None


def _too_large(limit: int, declared: int | None) -> errors.BodyTooLarge:
    size = f" ({declared} bytes)" if declared is not None else ""
    return errors.BodyTooLarge(f"The request body{size} is larger than the limit of {limit} bytes.")


# What each documented error status means, by code (the table in DEVELOPERS.md has them all).
_ERROR_STATUSES = {
    "401": "Not signed in or token unknown: `not_signed_in`, `invalid_token`, `missing_token`",
    "403": "Not allowed: `forbidden`, `csrf_failed` and the route's own refusals",
    "404": "Nothing there: `not_found` or the route's `unknown_*` code",
    "413": "The body is over the limit: `body_too_large`",
    "422": "The input fails validation: `invalid_request`, `validation_failed` and the route's own codes",
    "503": "Storage cannot take writes now: `storage_full`, `database_read_only`, `clip_store_unavailable`, "
    "`database_busy`, `database_unavailable`; the response carries Retry-After",
}
_UNSAFE = {"post", "put", "patch", "delete"}


def document_error_responses(app: Any) -> None:
    """Make /openapi.json list, for every operation, the error statuses it can answer.

    Staff routes: 401 and 403; routes with path parameters: 404; routes taking input: 422; routes
    taking a body: 413; every route: 503. Each error response refers to the one error body schema.
    """
    default_openapi = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is not None and app.openapi_schema.get("x-errors-documented"):
            return app.openapi_schema  # type: ignore[no-any-return]
        schema = default_openapi()
        staff = {
            (m.lower(), path)
            for path, route in _iter_routes(app.routes)
            if _needs_capability(route)
            for m in (getattr(route, "methods", None) or ())
        }
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        body_schema = errors.ErrorBody.model_json_schema(ref_template="#/components/schemas/{model}")
        components.update(body_schema.pop("$defs", {}))
        components["ErrorBody"] = body_schema
        ref = {"application/json": {"schema": {"$ref": "#/components/schemas/ErrorBody"}}}
        for path, operations in schema.get("paths", {}).items():
            for method, op in operations.items():
                params = op.get("parameters", [])
                wanted = {"503"}
                if (method, path) in staff:
                    wanted |= {"401", "403"}
                if any(p.get("in") == "path" for p in params):
                    wanted.add("404")
                if params or "requestBody" in op:
                    wanted.add("422")
                if "requestBody" in op or method in _UNSAFE:
                    wanted.add("413")
                responses = op.setdefault("responses", {})
                for status in sorted(wanted | {s for s in responses if s[0] in "45"}):
                    entry = responses.setdefault(status, {})
                    if not entry.get("description"):
                        entry["description"] = _ERROR_STATUSES.get(status, "An error; see the code")
                    entry["content"] = ref
        schema["x-errors-documented"] = True
        app.openapi_schema = schema
        return schema  # type: ignore[no-any-return]

    app.openapi = openapi
