"""Staff accounts: creation, sign-in, personal API tokens."""

from __future__ import annotations

import re

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import ApiToken, User
from server.auth.passwords import DUMMY_HASH, MIN_PASSWORD_LENGTH, hash_password, verify_password
from server.db import utcnow
from server.errors import Conflict, ValidationFailed
from server.roles import ROLES
from server.tokens import STAFF_PREFIX, new_token, token_digest

_EMAIL = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")


def create_user(session: Session, *, email: str, name: str, role: str, password: str,
                is_adjudicator: bool = False, actor: User | str | None = "cli") -> User:
    email = email.strip().lower()
    errors = {}
    if not _EMAIL.match(email):
        errors["email"] = f"'{email}' is not an e-mail address."
    if role not in ROLES:
        errors["role"] = f"Role '{role}' is not one of {', '.join(ROLES)}."
    if len(password) < MIN_PASSWORD_LENGTH:
        errors["password"] = f"The password needs at least {MIN_PASSWORD_LENGTH} characters."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    if session.scalar(select(User).where(User.email == email)) is not None:
        raise Conflict(f"A user with e-mail {email} already exists.", code="user_exists")
    user = User(email=email, name=name or email.split("@")[0], role=role,
                password_hash=hash_password(password), is_adjudicator=is_adjudicator)
    session.add(user)
    session.flush()
    audit.record(session, actor, "user.create", "user", user.id, {"email": email, "role": role})
    return user


def authenticate(session: Session, email: str, password: str) -> User | None:
    user = session.scalar(select(User).where(User.email == email.strip().lower()))
    if user is None or not user.active:
        verify_password(DUMMY_HASH, password)
        return None
    if not verify_password(user.password_hash, password):
        return None
    user.last_login_at = utcnow()
    return user


def create_api_token(session: Session, user: User, label: str) -> tuple[ApiToken, str]:
    token = new_token(STAFF_PREFIX)
    row = ApiToken(user_id=user.id, label=label[:100] or "token", token_hash=token_digest(token))
    session.add(row)
    session.flush()
    audit.record(session, user, "api_token.create", "api_token", row.id, {"label": row.label})
    return row, token


def find_user_by_api_token(session: Session, token: str) -> User | None:
    row = session.scalar(select(ApiToken).where(ApiToken.token_hash == token_digest(token)))
    if row is None or row.revoked or not row.user.active:
        return None
    return row.user


def list_users(session: Session) -> list[User]:
    return list(session.scalars(select(User).order_by(User.role, User.email)))
