"""Staff pages: devices, one device, recent alerts."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query, Request
from starlette.responses import Response

from server.auth.models import User
from server.deps import DbSession, SettingsDep, require
from server.devices import service, views
from server.roles import allowed
from server.web.templating import render

router = APIRouter(include_in_schema=False)


@router.get("/devices")
def devices_page(
    request: Request, session: DbSession, settings: SettingsDep, user: User = Depends(require("devices.view"))
) -> Response:
    rows = views.device_rows(session, settings)
    return render(request, "devices/list.html", {"devices": rows, "skew_limit_s": settings.clock_skew_flag_s})


@router.get("/devices/{serial}")
def device_page(
    serial: str,
    request: Request,
    session: DbSession,
    settings: SettingsDep,
    user: User = Depends(require("devices.view")),
) -> Response:
    device = service.get_device(session, serial)
    row = views.device_row(session, settings, device)
    alerts = views.alert_rows(session, service.list_alerts(session, device_id=device.id, limit=50))
    segments = views.recent_segments(session, device.id)
    installs = views.device_installations(session, device.id)
    return render(
        request,
        "devices/detail.html",
        {
            "device": row,
            "alerts": alerts,
            "segments": segments,
            "installations": installs,
            "can_listen": allowed(user.role, "clips.listen"),
            "skew_limit_s": settings.clock_skew_flag_s,
        },
    )


@router.get("/alerts")
def alerts_page(
    request: Request,
    session: DbSession,
    page: int = Query(1, ge=1, le=100000),
    user: User = Depends(require("alerts.view")),
) -> Response:
    per = 50
    alerts = views.alert_rows(session, service.list_alerts(session, limit=per, offset=(page - 1) * per))
    can_listen = allowed(user.role, "clips.listen")
    return render(
        request,
        "alerts/list.html",
        {
            "alerts": alerts,
            "page": page,
            "per": per,
            "can_listen": can_listen,
            "total": service.count_alerts(session),
        },
    )
