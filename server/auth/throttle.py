"""Sign-in throttling: failures are counted per account and per client address, in the database.

After ``limit`` failures within ``window_s`` the key is blocked for ``block_s``; every further
failure doubles the block, up to ``block_max_s``. A blocked sign-in is refused before any password
is hashed. A success clears its account's count; an address's count only ages out (one valid
account must not let a client reset its address and go on guessing other accounts' passwords).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import math

from sqlalchemy import delete, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from server.auth.models import SignInStrikes

ACCOUNT, ADDRESS = "account", "address"


@dataclasses.dataclass(frozen=True)
class Policy:
    account_limit: int
    address_limit: int
    window_s: int
    block_s: int
    block_max_s: int

    def limit(self, kind: str) -> int:
        return self.account_limit if kind == ACCOUNT else self.address_limit

    def block_for(self, kind: str, failures: int) -> int:
        """Seconds blocked after the ``failures``-th failure (0 below the limit)."""
        over = failures - self.limit(kind)
        if over < 0:
            return 0
        return min(self.block_max_s, self.block_s * 2 ** min(over, 30))


def _digest(kind: str, value: str) -> str:
    return hashlib.sha256(f"{kind}:{value.strip().lower()}".encode()).hexdigest()


def keys(email: str, address: str | None) -> list[tuple[str, str]]:
    out = [(ACCOUNT, _digest(ACCOUNT, email[:254]))]
    if address:
        out.append((ADDRESS, _digest(ADDRESS, address)))
    return out


def _row(session: Session, kind: str, digest: str) -> SignInStrikes | None:
    return session.scalar(
        select(SignInStrikes)
        .where(SignInStrikes.kind == kind, SignInStrikes.key_digest == digest)
        .execution_options(populate_existing=True)
    )


@dataclasses.dataclass(frozen=True)
class Blocked:
    kind: str  # which key is blocked: "account" or "address"
    retry_after_s: int


def check(session: Session, email: str, address: str | None, *, now: dt.datetime) -> Blocked | None:
    """The longest block on this e-mail or address, or None when a sign-in may be tried."""
    worst: Blocked | None = None
    for kind, digest in keys(email, address):
        row = _row(session, kind, digest)
        if row is None or row.blocked_until is None or row.blocked_until <= now:
            continue
        wait = max(1, math.ceil((row.blocked_until - now).total_seconds()))
        if worst is None or wait > worst.retry_after_s:
            worst = Blocked(kind, wait)
    return worst


def record_failure(
    session: Session, email: str, address: str | None, *, now: dt.datetime, policy: Policy
) -> Blocked | None:
    """Count a failure on both keys; returns the block it started, if any."""
    started: Blocked | None = None
    for kind, digest in keys(email, address):
        row = _row(session, kind, digest)
        if row is None:
            row = SignInStrikes(
                kind=kind, key_digest=digest, failures=0, first_failed_at=now, last_failed_at=now
            )
            try:
                with session.begin_nested():
                    session.add(row)
            except IntegrityError:  # another process counted its first failure at the same moment
                row = _row(session, kind, digest)
                assert row is not None
        elif (now - row.last_failed_at).total_seconds() > policy.window_s:
            row.failures, row.first_failed_at, row.blocked_until = 0, now, None  # aged out: start again
        row.failures += 1
        row.last_failed_at = now
        block = policy.block_for(kind, row.failures)
        if block:
            row.blocked_until = now + dt.timedelta(seconds=block)
            if started is None or block > started.retry_after_s:
                started = Blocked(kind, block)
    session.flush()
    return started


def record_success(session: Session, email: str) -> None:
    kind, digest = keys(email, None)[0]
    session.execute(
        delete(SignInStrikes).where(SignInStrikes.kind == kind, SignInStrikes.key_digest == digest)
    )


def purge(session: Session, *, now: dt.datetime, policy: Policy) -> int:
    """Drop counts that have aged out and are not blocking (keeps the table small)."""
    cutoff = now - dt.timedelta(seconds=max(policy.window_s, policy.block_max_s))
    result = session.execute(delete(SignInStrikes).where(SignInStrikes.last_failed_at < cutoff))
    return int(result.rowcount)  # type: ignore[attr-defined]
