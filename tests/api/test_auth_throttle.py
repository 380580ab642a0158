"""Sign-in throttling per account and per client address (state in the database, refused before
any Argon2 work), its reset after a success, and the audit rows of sign-ins."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.auth import pages as auth_pages
from server.auth import throttle
from server.auth.models import AuditEvent, SignInStrikes
from tests import factories

T0 = dt.datetime(2026, 11, 2, 9, 0, tzinfo=dt.UTC)
WRONG = "definitely not the password"


class Clock:
    def __init__(self, at: dt.datetime = T0) -> None:
        self.at = at

    def __call__(self) -> dt.datetime:
        return self.at

    def advance(self, **kw: float) -> None:
        self.at += dt.timedelta(**kw)


@pytest.fixture
def hashes(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Counts the Argon2 verifications the sign-in page runs."""
    calls: list[str] = []
    real = auth_pages.verify_password

    def counting(password_hash: str, password: str) -> bool:
        calls.append(password)
        return real(password_hash, password)

    monkeypatch.setattr(auth_pages, "verify_password", counting)
    return calls


def _try(c: TestClient, email: str, password: str):  # type: ignore[no-untyped-def]
    page = c.get("/login")
    csrf = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)  # type: ignore[union-attr]
    return c.post(
        "/login", data={"email": email, "password": password, "csrf_token": csrf}, follow_redirects=False
    )


def test_account_is_blocked_after_five_failures_before_any_hashing(
    app, session: Session, hashes: list[str]
) -> None:  # type: ignore[no-untyped-def]
    clock = Clock()
    app.state.auth_clock = clock
    user, _ = factories.make_user(session, role="reviewer")
    with TestClient(app, raise_server_exceptions=False) as c:
        for i in range(5):
            r = _try(c, user.email, WRONG)
            assert r.status_code == 401 and "not right" in r.text, i
        assert len(hashes) == 5
        r = _try(c, user.email, factories.PASSWORD)  # even the right password waits
        assert r.status_code == 429 and r.headers["retry-after"] == "30"
        assert "Too many failed sign-ins" in r.text and "30 seconds" in r.text
        assert len(hashes) == 5  # refused before Argon2
        clock.advance(seconds=29)
        assert (
            _try(c, user.email.upper(), factories.PASSWORD).headers["retry-after"] == "1"
        )  # e-mail in any case
        clock.advance(seconds=1)
        # The block has run out; one more failure doubles it.
        assert _try(c, user.email, WRONG).status_code == 401
        r = _try(c, user.email, factories.PASSWORD)
        assert r.status_code == 429 and r.headers["retry-after"] == "60"
        clock.advance(seconds=60)
        assert _try(c, user.email, factories.PASSWORD).status_code == 303
    # Success cleared the account's count: five more failures are needed to block again.
    with TestClient(app, raise_server_exceptions=False) as c:
        for _ in range(4):
            assert _try(c, user.email, WRONG).status_code == 401
        assert _try(c, user.email, factories.PASSWORD).status_code == 303


def test_unknown_accounts_count_too_and_cost_the_same_hash(app, session: Session, hashes: list[str]) -> None:  # type: ignore[no-untyped-def]
    app.state.auth_clock = Clock()
    with TestClient(app, raise_server_exceptions=False) as c:
        for _ in range(5):
            assert _try(c, "nobody@example.test", WRONG).status_code == 401
        assert len(hashes) == 5
        assert _try(c, "nobody@example.test", WRONG).status_code == 429
        assert len(hashes) == 5


def test_address_is_blocked_across_accounts_and_a_success_does_not_clear_it(
    app,
    session: Session,  # type: ignore[no-untyped-def]
    hashes: list[str],
) -> None:
    clock = Clock()
    app.state.auth_clock = clock
    app.state.settings.sign_in_address_limit = 8
    users = [factories.make_user(session, role="lead")[0] for _ in range(5)]
    mine, _ = factories.make_user(session, role="lead")
    with TestClient(app, raise_server_exceptions=False) as c:
        for i in range(7):  # spread over accounts: none reaches its own limit of five
            assert _try(c, users[i % 5].email, WRONG).status_code == 401
        assert _try(c, mine.email, factories.PASSWORD).status_code == 303  # a success for one account
        assert _try(c, users[0].email, WRONG).status_code == 401  # the 8th failure from this address
        n = len(hashes)
        r = _try(c, mine.email, factories.PASSWORD)
        assert r.status_code == 429 and r.headers["retry-after"] == "30" and len(hashes) == n
    rows = {
        r.kind: r for r in session.scalars(select(SignInStrikes).execution_options(populate_existing=True))
    }
    assert rows["address"].failures == 8 and rows["address"].blocked_until == T0 + dt.timedelta(seconds=30)
    # Counts age out after the window.
    clock.advance(seconds=app.state.settings.sign_in_window_s + 1)
    with TestClient(app, raise_server_exceptions=False) as c:
        assert _try(c, users[1].email, WRONG).status_code == 401
    row = session.scalar(
        select(SignInStrikes).where(SignInStrikes.kind == "address").execution_options(populate_existing=True)
    )
    assert row is not None and row.failures == 1 and row.blocked_until is None


def test_sign_ins_are_in_the_audit_trail(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    app.state.auth_clock = Clock()
    user, _ = factories.make_user(session, role="coordinator")
    with TestClient(app, raise_server_exceptions=False) as c:
        assert _try(c, user.email, WRONG).status_code == 401
        assert _try(c, "ghost@example.test", WRONG).status_code == 401
        assert _try(c, user.email, factories.PASSWORD).status_code == 303
    failed = session.scalars(
        select(AuditEvent).where(AuditEvent.action == "auth.sign_in_failed").order_by(AuditEvent.id)
    ).all()
    assert [(e.object_id, e.detail["reason"], e.detail["email"]) for e in failed] == [
        (str(user.id), "wrong_password", user.email),
        (None, "unknown_or_inactive", "ghost@example.test"),
    ]
    assert all(e.actor_id is None and e.actor_label == "client:testclient" for e in failed)
    assert all(WRONG not in str(e.detail) for e in failed)
    [ok] = session.scalars(select(AuditEvent).where(AuditEvent.action == "auth.sign_in")).all()
    assert ok.actor_id == user.id and ok.object_id == str(user.id) and ok.detail["address"] == "testclient"
    assert user.last_login_at == T0


def test_an_inactive_account_cannot_sign_in(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    user, _ = factories.make_user(session, role="coordinator")
    user.active = False
    session.flush()
    with TestClient(app, raise_server_exceptions=False) as c:
        assert _try(c, user.email, factories.PASSWORD).status_code == 401


def test_block_lengths_grow_and_stop_at_the_maximum() -> None:
    p = throttle.Policy(account_limit=5, address_limit=20, window_s=900, block_s=30, block_max_s=900)
    assert [p.block_for("account", n) for n in range(3, 12)] == [0, 0, 30, 60, 120, 240, 480, 900, 900]
    assert p.block_for("address", 19) == 0 and p.block_for("address", 20) == 30
    assert p.block_for("account", 10_000) == 900


def test_a_flooded_password_check_answers_busy_not_a_hang(app, session: Session) -> None:  # type: ignore[no-untyped-def]
    import anyio

    user, _ = factories.make_user(session, role="coordinator")
    app.state.settings.password_wait_s = 0.2
    with TestClient(app, raise_server_exceptions=False) as c:
        limiter = anyio.CapacityLimiter(1)
        app.state.password_limiter = limiter
        holder = object()
        c.portal.call(limiter.acquire_on_behalf_of, holder)  # every slot taken
        try:
            r = _try(c, user.email, factories.PASSWORD)
            assert r.status_code == 429 and r.headers["retry-after"] == "5" and "busy" in r.text
        finally:
            c.portal.call(limiter.release_on_behalf_of, holder)
        assert _try(c, user.email, factories.PASSWORD).status_code == 303
