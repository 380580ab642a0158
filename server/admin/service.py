"""Staff accounts: create, change access, deactivate, reactivate, reset password; every change audited.

Services flush and never commit. Ending a user's sessions goes through ``server.auth.service``.
"""

from __future__ import annotations

import secrets
import unicodedata
from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.auth import service as auth_service
from server.auth.models import Role, User
from server.errors import Conflict, NotFound, ValidationFailed
from server.roles import ADMIN, ROLES
from server.trials import service as trials_service

# No look-alike characters (0/O, 1/l/I), so a password read aloud or copied by hand survives.
_ALPHABET = "abcdefghjkmnpqrstuvwxyzACDEFGHJKLMNPQRTUVWXY346789"


class UnknownUser(NotFound):
    code = "unknown_user"


class LastAdmin(Conflict):
    code = "last_admin"


@dataclass(frozen=True)
class AccountChange:
    """What an access change did: ``changed`` is False when the account already was that way."""

    user: User
    changed: bool
    sessions_ended: int = 0


def has_control_characters(text: str) -> bool:
    """True when ``text`` holds a control character (NUL, tab, line breaks...): refused in names."""
    return any(unicodedata.category(ch) == "Cc" for ch in text)


def temporary_password() -> str:
    """Four groups of five characters (about 113 bits): passes the password rule, easy to pass on."""
    groups = ("".join(secrets.choice(_ALPHABET) for _ in range(5)) for _ in range(4))
    return "-".join(groups)


MAX_ID = 2**31 - 1  # ids are 32-bit integers; PostgreSQL refuses a larger parameter outright


def get_user(session: Session, user_id: int) -> User:
    user = session.get(User, user_id) if 1 <= user_id <= MAX_ID else None
    if user is None:
        raise UnknownUser(f"There is no staff account with id {user_id}.")
    return user


def get_user_by_email(session: Session, email: str) -> User:
    user = session.scalar(select(User).where(User.email == email.strip().lower()))
    if user is None:
        raise UnknownUser(f"There is no staff account with e-mail {email.strip()}.")
    return user


def list_users(session: Session) -> list[User]:
    """Active accounts first, then by role and e-mail."""
    return list(session.scalars(select(User).order_by(User.active.desc(), User.role, User.email)))


def _check_role(role: str) -> str:
    role = (role or "").strip()
    if role not in ROLES:
        raise ValidationFailed(
            f"Role '{role}' is not one of {', '.join(ROLES)}.", {"role": f"Choose one of {', '.join(ROLES)}."}
        )
    return role


def _ensure_another_admin(session: Session, leaving: User) -> None:
    """Refuse a change that would leave no active admin.

    Every active admin's row is locked, in id order, before counting (PostgreSQL; SQLite writers
    already hold the database lock). Two admins demoting each other at once then queue on the same
    rows, and the second re-reads the first's change (READ COMMITTED re-checks locked rows), so they
    cannot both succeed.
    """
    admins = session.scalars(
        select(User.id).where(User.role == ADMIN, User.active.is_(True)).order_by(User.id).with_for_update()
    ).all()
    if not [uid for uid in admins if uid != leaving.id]:
        raise LastAdmin(f"{leaving.email} is the last active admin; make another admin first.")


def _is_active_admin(user: User) -> bool:
    return user.active and user.role == ADMIN


def create_account(
    session: Session, *, actor: User | str, email: str, name: str, role: str, is_adjudicator: bool = False
) -> tuple[User, str]:
    """A new account with a printed temporary password that must be changed at first sign-in."""
    errors = {}
    for fld, value, limit in (("email", email.strip(), 254), ("name", name.strip(), 200)):
        if len(value) > limit:
            errors[fld] = f"At most {limit} characters (this has {len(value)})."
        elif has_control_characters(value):
            errors[fld] = "Control characters (such as tabs or line breaks) are not allowed here."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    password = temporary_password()
    user = auth_service.create_user(
        session,
        email=email,
        name=name.strip(),
        role=role,
        password=password,
        is_adjudicator=is_adjudicator,
        actor=actor,
        must_change_password=True,
    )
    return user, password


def change_access(
    session: Session,
    *,
    actor: User | str,
    user_id: int,
    role: str | None = None,
    is_adjudicator: bool | None = None,
) -> AccountChange:
    """Change role and/or the adjudicator permission; the user's sessions end when anything changed."""
    user = get_user(session, user_id)
    new_role = user.role if role is None else _check_role(role)
    new_adj = user.is_adjudicator if is_adjudicator is None else bool(is_adjudicator)
    if new_role == user.role and new_adj == user.is_adjudicator:
        return AccountChange(user, changed=False)
    if _is_active_admin(user) and new_role != ADMIN:
        _ensure_another_admin(session, user)
    before = {"role": user.role, "is_adjudicator": user.is_adjudicator}
    user.role, user.is_adjudicator = Role(new_role).value, new_adj
    session.flush()
    ended = auth_service.end_sessions(session, user.id, reason="access_change")
    audit.record(
        session,
        actor,
        "user.access_change",
        "user",
        user.id,
        {
            "email": user.email,
            "before": before,
            "after": {"role": new_role, "is_adjudicator": new_adj},
            "sessions_ended": ended,
        },
    )
    return AccountChange(user, changed=True, sessions_ended=ended)


def deactivate(session: Session, *, actor: User | str, user_id: int) -> AccountChange:
    """Stop the account signing in or using its API tokens, and end its sessions at once."""
    user = get_user(session, user_id)
    if not user.active:
        return AccountChange(user, changed=False)
    if user.role == ADMIN:
        _ensure_another_admin(session, user)
    user.active = False
    session.flush()
    ended = auth_service.end_sessions(session, user.id, reason="deactivated")
    audit.record(
        session, actor, "user.deactivate", "user", user.id, {"email": user.email, "sessions_ended": ended}
    )
    return AccountChange(user, changed=True, sessions_ended=ended)


def reactivate(session: Session, *, actor: User | str, user_id: int) -> AccountChange:
    user = get_user(session, user_id)
    if user.active:
        return AccountChange(user, changed=False)
    user.active = True
    session.flush()
    audit.record(session, actor, "user.reactivate", "user", user.id, {"email": user.email})
    return AccountChange(user, changed=True)


def reset_password(session: Session, *, actor: User | str, user_id: int) -> tuple[User, str]:
    """A new temporary password, shown once to the admin; the user must change it at next sign-in.

    Setting it ends the user's sessions, so a session opened with the old password stops at once.
    """
    user = get_user(session, user_id)
    password = temporary_password()
    # Recorded in the audit trail by set_password as "user.password_set" with must_change true.
    auth_service.set_password(session, user, password, must_change=True, actor=actor)
    return user, password


def set_trials(session: Session, *, actor: User | str, user_id: int, trial_codes: list[str]) -> list[str]:
    """Limit an account to these trials (none: every trial). Admins see every trial whatever is set."""
    account = get_user(session, user_id)
    return trials_service.set_memberships(session, account, trial_codes, actor=actor)


def trial_choices(session: Session, user_id: int) -> list[tuple[str, str, bool]]:
    """(code, name, held) for every trial, for the account page's checkboxes."""
    held = trials_service.membership_trial_ids(session, user_id)
    return [(t.code, t.name, t.id in held) for t in trials_service.list_trials(session)]
