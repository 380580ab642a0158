"""Device API v1 (heartbeats, alerts) and the staff API for devices, alerts and clips."""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, TypeVar

from anyio import to_thread
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import FileResponse, JSONResponse
from pydantic import ValidationError
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session

from server.auth.models import User
from server.deps import ClipStoreDep, DbSession, SettingsDep, require
from server.devices import service, views
from server.devices.models import Device
from server.devices.schemas import (
    AlertOut,
    AlertReceipt,
    DeviceCreated,
    DeviceIn,
    DeviceOut,
    HeartbeatIn,
    HeartbeatOut,
)
from server.devices.upload import boundary_of, read_alert_upload
from server.errors import ClipTooLarge, InvalidRequest, MissingToken, ValidationFailed
from server.trials import service as trials_service

router = APIRouter()
T = TypeVar("T")

HEARTBEAT_BODY_LIMIT = 16 * 1024


def current_device(request: Request, session: DbSession) -> Device:
    """The device behind ``Authorization: Bearer <token>``; checked before any body is read."""
    header = request.headers.get("authorization")
    if not header:
        raise MissingToken()
    scheme, _, token = header.partition(" ")
    token = token.strip()
    if scheme.lower() != "bearer" or not token:
        raise MissingToken("The Authorization header must read 'Bearer <token>'.")
    # The look-up only reads: on SQLite it begins as a plain (deferred) transaction, so it does not
    # queue for the write lock behind other devices' writes (no effect on a transaction already
    # open, nor on PostgreSQL).
    if isinstance(session.get_bind(), Engine) and not session.in_transaction():
        session.connection(execution_options={"sqlite_immediate": False})
    device = service.authenticate_device(session, token)
    # End the look-up's transaction before the body streams in, so a slow upload holds nothing.
    session.commit()
    return device


CurrentDevice = Annotated[Device, Depends(current_device)]


async def _run_device_work(request: Request, work: Callable[[], T]) -> T:
    """Run a device call's database and file work on a worker thread, a few calls at a time.

    Every call still gets its turn; past the app's limit (set in its lifespan) the rest wait on the
    event loop rather than crowd the interpreter lock.
    """
    limiter = getattr(request.app.state, "device_work_limiter", None)
    return await to_thread.run_sync(work, limiter=limiter)


async def _read_limited(request: Request, limit: int) -> bytes:
    body = bytearray()
    async for chunk in request.stream():
        body.extend(chunk)
        if len(body) > limit:
            raise InvalidRequest(f"The body is larger than {limit // 1024} KiB.")
    return bytes(body)


@router.post(
    "/api/v1/heartbeats",
    response_model=HeartbeatOut,
    tags=["device"],
    summary="Report that the device is alive and whether it is listening",
    responses={401: {}, 403: {}, 422: {}},
)
async def post_heartbeat(
    request: Request, device: CurrentDevice, session: DbSession, settings: SettingsDep
) -> JSONResponse:
    raw = await _read_limited(request, HEARTBEAT_BODY_LIMIT)
    try:
        beat = HeartbeatIn.model_validate_json(raw)
    except ValidationError as exc:
        err = exc.errors()[0]
        loc = ".".join(str(p) for p in err.get("loc", ()))
        raise ValidationFailed(
            f"Heartbeat field '{loc}': {err.get('msg')}." if loc else f"Heartbeat body: {err.get('msg')}.",
            field=loc or None,
            code="invalid_request",
        ) from exc

    def work() -> JSONResponse:
        received_at, next_s = service.record_heartbeat(
            session, device=device, beat=beat, settings=settings, now=request.app.state.clock()
        )
        session.commit()
        # A ready response: FastAPI would otherwise validate and encode the model a second time.
        return JSONResponse(
            HeartbeatOut(received_at=received_at, next_heartbeat_s=next_s).model_dump(mode="json")
        )

    return await _run_device_work(request, work)


@router.post(
    "/api/v1/alerts",
    status_code=201,
    response_model=AlertReceipt,
    tags=["device"],
    summary="Upload one alert: multipart with a 'meta' JSON part and a 'clip' audio part",
    responses={
        200: {"model": AlertReceipt, "description": "A resend of a stored alert"},
        400: {},
        401: {},
        403: {},
        409: {},
        413: {},
        415: {},
        422: {},
    },
)
async def post_alert(
    request: Request, device: CurrentDevice, session: DbSession, settings: SettingsDep, store: ClipStoreDep
) -> JSONResponse:
    boundary_of(request.headers.get("content-type", ""))  # 415 before reading anything
    length = request.headers.get("content-length")
    if length and length.isdigit() and int(length) > settings.max_clip_bytes + 512 * 1024:
        raise ClipTooLarge(
            f"The upload is {int(length)} bytes; a clip may be at most {settings.max_clip_bytes} bytes."
        )
    upload = await read_alert_upload(
        request.stream(), request.headers.get("content-type", ""), store, settings.max_clip_bytes
    )
    clip = upload.clip
    assert clip is not None and upload.meta is not None
    meta = upload.meta

    def work() -> tuple[int, bool]:
        with clip:
            result = service.ingest_alert(
                session,
                store=store,
                settings=settings,
                device=device,
                meta_raw=meta,
                upload=clip,
                now=request.app.state.clock(),
            )
            alert_id, duplicate = result.alert_id, result.duplicate
            session.commit()
        return alert_id, duplicate

    alert_id, duplicate = await _run_device_work(request, work)
    return JSONResponse({"alert_id": alert_id, "duplicate": duplicate}, status_code=200 if duplicate else 201)


# --- staff API --------------------------------------------------------------------------------


@router.get("/api/v1/devices", response_model=list[DeviceOut], tags=["staff"])
def api_list_devices(
    session: DbSession, settings: SettingsDep, user: User = Depends(require("devices.view"))
) -> list[DeviceOut]:
    return views.device_rows(session, settings)


@router.post(
    "/api/v1/devices",
    response_model=DeviceCreated,
    status_code=201,
    tags=["staff"],
    summary="Register a device; the token is shown once in this response",
)
def api_register_device(
    body: DeviceIn, session: DbSession, settings: SettingsDep, user: User = Depends(require("devices.manage"))
) -> DeviceCreated:
    trial = (
        trials_service.get_trial(session, body.trial)
        if body.trial
        else trials_service.ensure_default_trial(
            session, settings.default_trial_code, settings.default_sound_classes
        )
    )
    device, token = service.register_device(
        session, serial=body.serial, trial=trial, hardware_model=body.hardware_model, actor=user
    )
    session.commit()
    row = views.device_row(session, settings, device)
    return DeviceCreated(**row.model_dump(), token=token)


@router.post("/api/v1/devices/{serial}/revoke", response_model=DeviceOut, tags=["staff"])
def api_revoke_device(
    serial: str, session: DbSession, settings: SettingsDep, user: User = Depends(require("devices.manage"))
) -> DeviceOut:
    device = service.revoke_device(session, serial, actor=user)
    session.commit()
    return views.device_row(session, settings, device)


@router.get("/api/v1/alerts", response_model=list[AlertOut], tags=["staff"])
def api_list_alerts(
    session: DbSession,
    limit: int = Query(100, ge=1, le=1000),
    offset: int = Query(0, ge=0),
    user: User = Depends(require("alerts.view")),
) -> list[AlertOut]:
    return views.alert_rows(session, service.list_alerts(session, limit=limit, offset=offset))


@router.get("/api/v1/alerts/{alert_id}", response_model=AlertOut, tags=["staff"])
def api_get_alert(
    alert_id: int, session: DbSession, user: User = Depends(require("alerts.view"))
) -> AlertOut:
    return views.alert_rows(session, [service.get_alert(session, alert_id)])[0]


def _serve_clip(alert_id: int, session: Session, store: ClipStoreDep, user: User) -> FileResponse:
    path, media_type = views.clip_file_for(session, store, user, alert_id)
    return FileResponse(path, media_type=media_type, headers={"Cache-Control": "private, no-store"})


@router.get(
    "/api/v1/alerts/{alert_id}/clip",
    tags=["staff"],
    response_class=FileResponse,
    summary="The alert's audio as received; supports HTTP Range",
)
def api_get_clip(
    alert_id: int, session: DbSession, store: ClipStoreDep, user: User = Depends(require("clips.listen"))
) -> FileResponse:
    return _serve_clip(alert_id, session, store, user)


@router.get("/clips/{alert_id}/audio", include_in_schema=False)
def page_clip_audio(
    alert_id: int, session: DbSession, store: ClipStoreDep, user: User = Depends(require("clips.listen"))
) -> FileResponse:
    return _serve_clip(alert_id, session, store, user)
