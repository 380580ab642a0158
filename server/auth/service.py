"""Staff accounts: creation, passwords, sign-in, sessions, personal API tokens."""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import os
import re
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.auth import sessions, throttle
from server.auth.models import ApiToken, StaffSession, User
from server.auth.passwords import DUMMY_HASH, hash_password, password_problem
from server.db import utcnow
from server.errors import AppError, Conflict, NotFound, ValidationFailed
from server.roles import ADMIN, ROLES
from server.tokens import STAFF_PREFIX, new_token, token_digest

_EMAIL = re.compile(r"^[^@\s]+@[^@\s]+\.[^@\s]+$")

DEFAULT_TOKEN_DAYS = 90
MAX_TOKEN_DAYS = 365


# --- passwords ----------------------------------------------------------------------------------


def check_password_rule(password: str) -> None:
    """At least 12 characters and not on the shipped list of common passwords (any case)."""
    problem = password_problem(password)
    if problem is not None:
        raise ValidationFailed(problem, {"password": problem})


# Argon2 takes a core for ~0.1 s per sign-in. On threads of their own at a lower CPU priority, the
# checks of a sign-in flood yield the processor to device calls and pages instead of sharing it
# evenly (bench_signin_flood.py: heartbeat p95 under a flood 2.8-3.0x quiet before, 1.8-2.3x after).
# How many run at once is bounded by the caller (``password_check_slots``, at most 16).
PASSWORD_THREAD_NICE = 10
_password_threads: ThreadPoolExecutor | None = None
_password_threads_lock = threading.Lock()


def _yield_cpu() -> None:
    try:  # Linux: a thread's nice value is its own
        os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), PASSWORD_THREAD_NICE)
    except (AttributeError, OSError):  # elsewhere, or not permitted: normal priority
        pass


def _password_executor() -> ThreadPoolExecutor:
    global _password_threads
    with _password_threads_lock:
        if _password_threads is None:
            _password_threads = ThreadPoolExecutor(
                max_workers=16, thread_name_prefix="trialhouse-argon2", initializer=_yield_cpu
            )
        return _password_threads


async def run_password_work(check: Callable[[str, str], bool], password_hash: str, password: str) -> bool:
    """``check(password_hash, password)`` (Argon2) on a low-priority thread, awaited off the loop."""
    loop = asyncio.get_running_loop()
    return await loop.run_in_executor(_password_executor(), check, password_hash, password)


def create_user(
    session: Session,
    *,
    email: str,
    name: str,
    role: str,
    password: str,
    is_adjudicator: bool = False,
    actor: User | str | None = "cli",
    must_change_password: bool = False,
) -> User:
    email = email.strip().lower()
    errors = {}
    if not _EMAIL.match(email):
        errors["email"] = f"'{email}' is not an e-mail address."
    if role not in ROLES:
        errors["role"] = f"Role '{role}' is not one of {', '.join(ROLES)}."
    problem = password_problem(password)
    if problem is not None:
        errors["password"] = problem
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    if session.scalar(select(User).where(User.email == email)) is not None:
        raise Conflict(f"A user with e-mail {email} already exists.", code="user_exists")
    user = User(
        email=email,
        name=name or email.split("@")[0],
        role=role,
        password_hash=hash_password(password),
        is_adjudicator=is_adjudicator,
        must_change_password=must_change_password,
    )
    session.add(user)
    session.flush()
    audit.record(session, actor, "user.create", "user", user.id, {"email": email, "role": role})
    return user


def set_password(
    session: Session,
    user: User,
    new_password: str,
    *,
    must_change: bool = False,
    actor: User | str | None = None,
    now: dt.datetime | None = None,
) -> None:
    """Check the rule, store the new hash and end every session of the user.

    ``must_change`` (an admin chose the password) keeps the user to the account page until they
    pick their own. A caller that wants the person to stay signed in starts a new session.
    """
    check_password_rule(new_password)
    user.password_hash = hash_password(new_password)
    user.must_change_password = must_change
    session.flush()
    ended = end_sessions(session, user.id, reason="password_changed", now=now)
    audit.record(
        session,
        actor if actor is not None else user,
        "user.password_set",
        "user",
        user.id,
        {"must_change": must_change, "sessions_ended": ended},
    )


# --- sessions -----------------------------------------------------------------------------------


def end_sessions(session: Session, user_id: int, *, reason: str, now: dt.datetime | None = None) -> int:
    """End every live session of the user at once; returns how many there were."""
    return sessions.end_all(session, user_id, reason=reason, now=now or utcnow())


def live_sessions(
    session: Session, user_id: int, *, now: dt.datetime, limits: sessions.Limits
) -> list[StaffSession]:
    return sessions.list_live(session, user_id, now=now, limits=limits)


# --- sign-in ------------------------------------------------------------------------------------


class SignInBlocked(AppError):
    """Too many failed sign-ins for this account or address: try again after ``retry_after_s``."""

    code, status = "sign_in_throttled", 429

    def __init__(self, retry_after_s: int) -> None:
        minutes = retry_after_s / 60
        wait = f"{retry_after_s} seconds" if retry_after_s < 120 else f"{minutes:.0f} minutes"
        super().__init__(
            f"Too many failed sign-ins. Wait {wait}, then try again.",
            headers={"Retry-After": str(retry_after_s)},
        )
        self.retry_after_s = retry_after_s


@dataclasses.dataclass(frozen=True)
class SignInAttempt:
    """What ``begin_sign_in`` found: the account (if any, and active) and the hash to verify against."""

    email: str
    address: str | None
    user: User | None
    password_hash: str


def begin_sign_in(session: Session, email: str, address: str | None, *, now: dt.datetime) -> SignInAttempt:
    """Refuse a blocked account or address (``SignInBlocked``) before any hashing; else find the user.

    An unknown or inactive account verifies against a dummy hash, so every path costs the same.
    """
    email = email.strip().lower()[:254]
    blocked = throttle.check(session, email, address, now=now)
    if blocked is not None:
        raise SignInBlocked(blocked.retry_after_s)
    user = session.scalar(select(User).where(User.email == email))
    if user is not None and not user.active:
        user = None
    return SignInAttempt(email, address, user, user.password_hash if user is not None else DUMMY_HASH)


def finish_sign_in(
    session: Session,
    attempt: SignInAttempt,
    verified: bool,
    *,
    now: dt.datetime,
    policy: throttle.Policy,
    user_agent: str | None = None,
    limits: sessions.Limits | None = None,
) -> tuple[StaffSession, str] | None:
    """Record the outcome: a new session (row, cookie value) for a success, None for a failure.

    Also drops aged-out strike counts (on a failure) and long-dead session rows (on a success, when
    ``limits`` is given), so neither table grows without bound.
    """
    if attempt.user is None or not verified:
        started = throttle.record_failure(session, attempt.email, attempt.address, now=now, policy=policy)
        detail: dict[str, str | int | None] = {
            "email": attempt.email,
            "address": attempt.address,
            "reason": "wrong_password" if attempt.user is not None else "unknown_or_inactive",
        }
        if started is not None:
            detail["blocked_s"] = started.retry_after_s
            detail["blocked_key"] = started.kind
        audit.record(
            session,
            f"client:{attempt.address or 'unknown'}",
            "auth.sign_in_failed",
            "user",
            attempt.user.id if attempt.user is not None else None,
            detail,
        )
        throttle.purge(session, now=now, policy=policy)  # aged-out counts (indexed; usually nothing)
        return None
    user = attempt.user
    throttle.record_success(session, attempt.email)
    if limits is not None:
        sessions.purge(session, now=now, limits=limits)
    user.last_login_at = now
    row, raw = sessions.start(session, user, now=now, user_agent=user_agent, client_addr=attempt.address)
    audit.record(
        session, user, "auth.sign_in", "user", user.id, {"address": attempt.address, "session": row.id}
    )
    return row, raw


def sign_out(session: Session, row: StaffSession, *, now: dt.datetime) -> None:
    if sessions.end(session, row.id, reason="signed_out", now=now):
        audit.record(session, row.user, "auth.sign_out", "user", row.user_id, {"session": row.id})


def authenticate(session: Session, email: str, password: str) -> User | None:
    """Check a password without throttling or a session (the CLI and tests); never used by pages."""
    from server.auth.passwords import verify_password

    user = session.scalar(select(User).where(User.email == email.strip().lower()))
    if user is None or not user.active:
        verify_password(DUMMY_HASH, password)
        return None
    if not verify_password(user.password_hash, password):
        return None
    return user


# --- personal API tokens ------------------------------------------------------------------------


def create_api_token(
    session: Session,
    user: User,
    label: str,
    *,
    days: int = DEFAULT_TOKEN_DAYS,
    max_days: int = MAX_TOKEN_DAYS,
    now: dt.datetime | None = None,
) -> tuple[ApiToken, str]:
    """A new token for ``user`` valid ``days`` days; returns the row and the token (shown only once)."""
    if not 1 <= days <= max_days:
        msg = f"A token can live from 1 to {max_days} days."
        raise ValidationFailed(msg, {"days": msg})
    label = label.strip()[:100] or "token"
    now = now or utcnow()
    token = new_token(STAFF_PREFIX)
    row = ApiToken(
        user_id=user.id,
        label=label,
        token_hash=token_digest(token),
        created_at=now,
        expires_at=now + dt.timedelta(days=days),
    )
    session.add(row)
    session.flush()
    audit.record(
        session,
        user,
        "api_token.create",
        "api_token",
        row.id,
        {"label": row.label, "expires_at": row.expires_at.isoformat()},
    )
    return row, token


def find_api_token(session: Session, token: str) -> ApiToken | None:
    """The token's row whatever its state (callers decide: revoked, expired, inactive user)."""
    if not token.startswith(STAFF_PREFIX) or len(token) > 200:
        return None
    return session.scalar(
        select(ApiToken)
        .where(ApiToken.token_hash == token_digest(token))
        .execution_options(populate_existing=True)
    )


def find_user_by_api_token(session: Session, token: str, *, now: dt.datetime | None = None) -> User | None:
    row = find_api_token(session, token)
    if row is None or row.state(now or utcnow()) != "live" or not row.user.active:
        return None
    return row.user


def list_api_tokens(session: Session, user_id: int) -> list[ApiToken]:
    """Every token of the user, newest first, whatever its state."""
    return list(
        session.scalars(
            select(ApiToken)
            .where(ApiToken.user_id == user_id)
            .order_by(ApiToken.created_at.desc(), ApiToken.id.desc())
        )
    )


def revoke_api_token(
    session: Session, token_id: int, *, by: User, now: dt.datetime | None = None
) -> ApiToken:
    """Revoke a token: its owner or an admin may. Revoking a revoked token changes nothing."""
    row = session.get(ApiToken, token_id)
    if row is None or (row.user_id != by.id and by.role != ADMIN):
        # Someone else's token reads as absent to non-admins: its id says nothing about who holds one.
        raise NotFound(f"No token {token_id} of yours.", code="unknown_token")
    if not row.revoked:
        row.revoked = True
        row.revoked_at = now or utcnow()
        session.flush()
        audit.record(
            session, by, "api_token.revoke", "api_token", row.id, {"label": row.label, "owner": row.user_id}
        )
    return row


def list_users(session: Session) -> list[User]:
    return list(session.scalars(select(User).order_by(User.role, User.email)))
