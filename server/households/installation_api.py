"""Installation API v1: list, install or move, remove and correct installations.

It lives with the register, not in server.installations, because it looks homes and devices up
(the installations package imports neither). Thin routes over households.service.install_device
and installations.service.
"""

from __future__ import annotations

from fastapi import APIRouter, Depends
from sqlalchemy.orm import Session

from server.auth.models import User
from server.deps import DbSession, require
from server.devices import service as devices_service
from server.devices.models import Device
from server.households import schemas, service
from server.installations import service as installations_service
from server.installations.models import Installation

router = APIRouter(prefix="/api/v1", tags=["register"])


def installation_out(session: Session, inst: Installation) -> schemas.InstallationOut:
    device = session.get(Device, inst.device_id)
    assert device is not None
    return schemas.InstallationOut(
        id=inst.id,
        device=device.serial,
        home=inst.home.code,
        room=inst.room,
        installed_at=inst.installed_at,
        removed_at=inst.removed_at,
        last_seen_at=device.last_seen_at,
    )


@router.get("/installations", response_model=list[schemas.InstallationOut])
def api_installations(
    session: DbSession,
    home: str | None = None,
    device: str | None = None,
    user: User = Depends(require("homes.view")),
) -> list[schemas.InstallationOut]:
    h = service.get_home(session, home) if home else None
    d = devices_service.get_device(session, device) if device else None
    found = installations_service.list_installations(session, home=h, device=d)
    return [installation_out(session, i) for i in found]


@router.post("/installations", response_model=schemas.InstallationResult, status_code=201)
def api_install(
    body: schemas.InstallationIn, session: DbSession, user: User = Depends(require("installations.manage"))
) -> schemas.InstallationResult:
    r = service.install_device(
        session,
        home=service.get_home(session, body.home),
        device=devices_service.get_device(session, body.device),
        room=body.room,
        installed_at=body.installed_at,
        actor=user,
        move=body.move,
    )
    session.commit()
    return schemas.InstallationResult(
        installation=installation_out(session, r.installation),
        closed=installation_out(session, r.closed) if r.closed else None,
        alerts_reattributed=r.reattributed,
    )


@router.post("/installations/{installation_id}/removal", response_model=schemas.InstallationOut)
def api_remove(
    installation_id: int,
    body: schemas.RemovalIn,
    session: DbSession,
    user: User = Depends(require("installations.manage")),
) -> schemas.InstallationOut:
    inst = installations_service.get_installation(session, installation_id)
    installations_service.remove_installation(session, inst, removed_at=body.removed_at, actor=user)
    session.commit()
    return installation_out(session, inst)


@router.patch(
    "/installations/{installation_id}",
    response_model=schemas.InstallationResult,
    summary="Correct an installation's dates or room; alerts are re-attributed (audited)",
)
def api_correct(
    installation_id: int,
    body: schemas.InstallationPatch,
    session: DbSession,
    user: User = Depends(require("installations.manage")),
) -> schemas.InstallationResult:
    inst = installations_service.get_installation(session, installation_id)
    removed = None if body.reopen else (body.removed_at or inst.removed_at)
    r = installations_service.correct_installation(
        session,
        inst,
        installed_at=body.installed_at or inst.installed_at,
        removed_at=removed,
        room=body.room or inst.room,
        actor=user,
    )
    session.commit()
    return schemas.InstallationResult(
        installation=installation_out(session, r.installation), alerts_reattributed=r.reattributed
    )
