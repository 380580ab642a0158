"""Decisions inside pages and services that follow the role matrix (server/roles.py), role by role:
private clips, the clip players on device and alert pages, who settles disagreements, and the
account page's note on admins and trials. Both backends.
"""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy.orm import Session

from server.review import service as review_service
from server.roles import ROLES
from tests import factories


@pytest.fixture
def flagged(session: Session, store, settings, trial):  # type: ignore[no-untyped-def]
    """A device with one ordinary alert and one whose clip a reviewer flagged as private content."""
    dev, _ = factories.make_device(session, trial)
    now = dt.datetime.now(dt.UTC)
    plain = factories.make_alert(session, store, settings, dev, detected_at=now - dt.timedelta(hours=2))
    private = factories.make_alert(session, store, settings, dev, detected_at=now - dt.timedelta(hours=1))
    reviewer, _ = factories.make_user(session, role="reviewer")
    review_service.flag_private(session, user=reviewer, alert_id=private.id)
    return dev, plain, private


def test_private_clip_is_served_to_admins_only(staff_client, client, flagged) -> None:  # type: ignore[no-untyped-def]
    _, plain, private = flagged
    expected = {
        "admin": (200, None),
        "coordinator": (403, "private_content"),
        "reviewer": (403, "private_content"),
        "lead": (403, "forbidden"),
    }
    for role in ROLES:
        c = staff_client(role)
        r = c.get(f"/api/v1/alerts/{private.id}/clip")
        code = None if r.status_code == 200 else r.json()["error"]["code"]
        assert (r.status_code, code) == expected[role], role
        # The same role hears an unflagged clip exactly when it may listen at all.
        assert c.get(f"/api/v1/alerts/{plain.id}/clip").status_code == (403 if role == "lead" else 200), role
    assert client.get("/api/v1/health").status_code == 200


def test_clip_players_show_for_roles_that_listen(staff_client, flagged) -> None:  # type: ignore[no-untyped-def]
    dev, plain, _ = flagged
    player = f'src="/clips/{plain.id}/audio"'
    for role, pages_with_player in {"admin": 2, "coordinator": 2, "lead": 0}.items():
        c = staff_client(role)
        pages = [c.get(f"/devices/{dev.serial}"), c.get("/alerts")]
        assert [r.status_code for r in pages] == [200, 200], role
        assert sum(player in r.text for r in pages) == pages_with_player, role
        # The alert's row is on both pages, with or without its player.
        assert all(f'<a href="/devices/{dev.serial}">' in r.text for r in pages), role
    # Reviewers listen from the desk only: neither page is theirs.
    reviewer = staff_client("reviewer")
    assert [reviewer.get(u).status_code for u in (f"/devices/{dev.serial}", "/alerts")] == [403, 403]


@pytest.mark.parametrize(
    ("role", "is_adjudicator", "settles"),
    [
        ("admin", False, True),
        ("admin", True, True),
        ("reviewer", False, False),
        ("reviewer", True, True),
        ("coordinator", False, False),
        ("coordinator", True, False),
        ("lead", False, False),
        ("lead", True, False),
    ],
)
def test_who_may_settle_disagreements(
    session: Session, role: str, is_adjudicator: bool, settles: bool
) -> None:
    user, _ = factories.make_user(session, role=role, is_adjudicator=is_adjudicator)
    assert review_service.can_adjudicate(user) is settles


def test_account_page_says_admins_see_every_trial_only_for_admin_accounts(
    staff_client, session: Session
) -> None:  # type: ignore[no-untyped-def]
    note = "Admins see every trial whatever is ticked here."
    admin = staff_client("admin")
    for role in ROLES:
        account, _ = factories.make_user(session, role=role)
        r = admin.get(f"/admin/staff/{account.id}")
        assert r.status_code == 200, role
        assert (note in r.text) is (role == "admin"), role
