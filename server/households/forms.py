"""The register rooms' page kit: reading form fields, dates in the trial's time zone, flashes, and
rendering a page with what every register template expects. Used by households, quota and staged pages.
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from typing import Any

from fastapi import Request
from fastapi.responses import RedirectResponse
from sqlalchemy.orm import Session
from starlette.datastructures import FormData
from starlette.responses import Response

from server.auth.models import User
from server.errors import ValidationFailed
from server.households import service
from server.households.models import Home, HomeState
from server.installations.models import ROOMS
from server.roles import allowed
from server.trials.models import Trial
from server.web.templating import render

CAPS = (
    "homes.manage",
    "personal.view",
    "personal.manage",
    "homes.erase",
    "installations.manage",
    "staged.manage",
    "quota.manage",
    "attributes.manage",
    "devices.view",
)
INPUT_FMT = "%Y-%m-%dT%H:%M"


async def form_data(request: Request) -> FormData:
    return await request.form()


def text(form: FormData, name: str) -> str:
    v = form.get(name)
    return v.strip() if isinstance(v, str) else ""


def flash(request: Request, message: str, kind: str = "ok") -> None:
    items = list(request.session.get("flash", []))
    items.append([kind, message])
    request.session["flash"] = items[-6:]


def page(request: Request, user: User, name: str, ctx: dict[str, Any], status_code: int = 200) -> Response:
    base = {
        "can": {c: allowed(user.role, c) for c in CAPS},
        "flashes": request.session.pop("flash", []),
        "rooms": ROOMS,
        "states": HomeState.all,
        "input_fmt": INPUT_FMT,
    }
    base.update(ctx)
    return render(request, name, base, status_code=status_code)


def go(url: str) -> Response:
    return RedirectResponse(url, status_code=303)


def now(request: Request) -> dt.datetime:
    return request.app.state.clock()  # type: ignore[no-any-return]


def local_dt_or_none(value: str, tz: str, field: str) -> dt.datetime | None:
    """A datetime-local form value, read in the trial's time zone, as aware UTC (None when blank)."""
    value = (value or "").strip()
    if not value:
        return None
    try:
        naive = dt.datetime.fromisoformat(value)
    except ValueError:
        raise ValidationFailed(
            f"'{value}' is not a date and time.", {field: "Use YYYY-MM-DD HH:MM."}
        ) from None
    if naive.tzinfo is not None:
        return naive.astimezone(dt.UTC)
    return naive.replace(tzinfo=zoneinfo.ZoneInfo(tz)).astimezone(dt.UTC)


def local_dt(value: str, tz: str, field: str) -> dt.datetime:
    at = local_dt_or_none(value, tz, field)
    if at is None:
        raise ValidationFailed("Give a date and time.", {field: "Give a date and time."})
    return at


def whole_number(value: str, field: str) -> int | None:
    value = (value or "").strip()
    if not value:
        return None
    try:
        return int(value)
    except ValueError:
        raise ValidationFailed(f"'{value}' is not a whole number.", {field: "A whole number."}) from None


def home_and_trial(session: Session, code: str) -> tuple[Home, Trial]:
    home = service.get_home(session, code)
    return home, service.trial_of(session, home)


def attribute_values(form: FormData, specs: list[Any]) -> dict[str, str]:
    return {s.key: text(form, f"attr_{s.key}") for s in specs}
