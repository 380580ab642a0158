"""The audit trail of sensitive actions (personal-data views and exports, erasure, revocation...)."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from server.auth.models import AuditEvent, User


def record(
    session: Session,
    actor: User | str | None,
    action: str,
    object_type: str,
    object_id: object = None,
    detail: dict[str, Any] | None = None,
) -> AuditEvent:
    if isinstance(actor, User):
        actor_id, label = actor.id, f"{actor.role}:{actor.email}"
    else:
        actor_id, label = None, actor or "system"
    event = AuditEvent(
        actor_id=actor_id,
        actor_label=label,
        action=action,
        object_type=object_type,
        object_id=None if object_id is None else str(object_id),
        detail=detail or {},
    )
    session.add(event)
    session.flush()
    return event
