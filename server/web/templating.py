"""One Jinja2 environment for all pages, with filters for dates, rates and intervals."""

from __future__ import annotations

import datetime as dt
import math
import zoneinfo
from pathlib import Path
from typing import Any

from fastapi import Request
from fastapi.templating import Jinja2Templates
from starlette.responses import Response

from server.deps import csrf_token
from server.roles import allowed

TEMPLATES_DIR = Path(__file__).resolve().parent.parent.parent / "templates"

NAV = [
    # (label, href, capability)
    ("Devices", "/devices", "devices.view"),
    ("Alerts", "/alerts", "alerts.view"),
    ("Homes", "/homes", "homes.view"),
    ("Quota", "/quota", "quota.view"),
    ("Listening desk", "/review", "review.work"),
    ("Agreement", "/review/agreement", "review.agreement"),
    ("Weekly summary", "/summary", "summary.view"),
    ("Staff accounts", "/admin/staff", "users.manage"),
    ("Audit trail", "/admin/audit", "audit.view"),
]


def _local(value: dt.datetime | None, tz: str | None = None, fmt: str = "%Y-%m-%d %H:%M") -> str:
    if value is None:
        return "—"
    if tz:
        try:
            value = value.astimezone(zoneinfo.ZoneInfo(tz))
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            pass
    return value.strftime(fmt)


def _ago(value: dt.datetime | None) -> str:
    if value is None:
        return "never"
    secs = (dt.datetime.now(dt.UTC) - value).total_seconds()
    if secs < 0:
        return "just now"
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if secs >= size:
            return f"{secs / size:.0f} {unit} ago"
    return f"{secs:.0f} s ago"


def _num(value: Any, digits: int = 2) -> str:
    if value is None:
        return "—"
    try:
        f = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(f):
        return "—"
    if math.isinf(f):
        return "∞"
    return f"{f:.{digits}f}"


def _pct(value: Any, digits: int = 0) -> str:
    if value is None:
        return "—"
    f = float(value)
    return "—" if math.isnan(f) else f"{100 * f:.{digits}f}%"


def make_templates() -> Jinja2Templates:
    templates = Jinja2Templates(directory=str(TEMPLATES_DIR))
    env = templates.env
    env.filters["local"] = _local
    env.filters["ago"] = _ago
    env.filters["num"] = _num
    env.filters["pct"] = _pct
    env.globals["allowed"] = allowed  # templates ask the role matrix: allowed(user.role, "audit.view")
    return templates


def render(
    request: Request,
    name: str,
    context: dict[str, Any] | None = None,
    status_code: int = 200,
    headers: dict[str, str] | None = None,
) -> Response:
    user = getattr(request.state, "user", None)
    ctx: dict[str, Any] = {
        "user": user,
        "csrf_token": csrf_token(request),
        "nav": [(label, href) for label, href, cap in NAV if user is not None and allowed(user.role, cap)],
        "path": request.url.path,
    }
    ctx.update(context or {})
    return request.app.state.templates.TemplateResponse(
        request, name, ctx, status_code=status_code, headers=headers
    )
