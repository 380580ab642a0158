"""Sign-in password checks (Argon2) run on low-priority threads of their own, so a sign-in flood yields
the processor to device calls; the answers are unchanged. Both backends."""

from __future__ import annotations

import os
import re
import threading

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session

from server.auth import pages as auth_pages
from server.auth import service as auth_service
from tests import factories


@pytest.fixture
def checks(monkeypatch: pytest.MonkeyPatch) -> list[tuple[str, int, bool]]:
    """(thread name, thread nice value, result) of every password check the sign-in page runs."""
    seen: list[tuple[str, int, bool]] = []
    real = auth_pages.verify_password

    def recording(password_hash: str, password: str) -> bool:
        result = real(password_hash, password)
        nice = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
        seen.append((threading.current_thread().name, nice, result))
        return result

    monkeypatch.setattr(auth_pages, "verify_password", recording)
    return seen


def _sign_in(c: TestClient, email: str, password: str) -> int:
    page = c.get("/login")
    m = re.search(r'name="csrf_token" value="([^"]+)"', page.text)
    assert m
    r = c.post(
        "/login",
        data={"email": email, "password": password, "csrf_token": m.group(1)},
        follow_redirects=False,
    )
    return r.status_code


def test_password_checks_run_on_low_priority_threads_and_answer_as_before(  # type: ignore[no-untyped-def]
    client: TestClient, session: Session, checks
) -> None:
    user, password = factories.make_user(session, role="lead")
    assert _sign_in(client, user.email, "not the password at all") == 401
    assert _sign_in(client, "nobody@example.test", "not the password at all") == 401  # the dummy hash
    assert _sign_in(client, user.email, password) == 303
    assert [result for _, _, result in checks] == [False, False, True]
    main_nice = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
    for name, nice, _ in checks:
        assert name.startswith("trialhouse-argon2"), name  # not the loop, not the shared worker threads
        # Lower priority than the request threads (unless the whole process already runs lower).
        assert nice == auth_service.PASSWORD_THREAD_NICE or main_nice >= auth_service.PASSWORD_THREAD_NICE, (
            nice,
            main_nice,
        )
    assert client.get("/account").status_code == 200
