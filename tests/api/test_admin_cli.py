"""`trialhouse user list | access | deactivate | reactivate | reset-password` in-process, on SQLite in a
temporary data directory: changes are audited as ``cli`` and the last active admin stays."""

from __future__ import annotations

import io
import json
import sys
from pathlib import Path

import pytest
from sqlalchemy import select

from server import cli
from server.auth.models import AuditEvent, User
from server.auth.passwords import verify_password
from server.settings import Settings
from tests.conftest import committed_session

PASSWORD = "amber kettle lantern 42"


@pytest.fixture
def data_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    d = tmp_path / "var"
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(d))
    monkeypatch.delenv("TRIALHOUSE_DATABASE_URL", raising=False)
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "admin-cli-test-secret-" + "q" * 32)
    return d


def run(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, *argv: str, stdin: str = ""
) -> tuple[int, str, str]:
    monkeypatch.setattr(sys, "stdin", io.StringIO(stdin))
    code = cli.main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def user(data_dir: Path, email: str) -> User:
    with committed_session(Settings(data_dir=data_dir)) as s:
        found = s.scalar(select(User).where(User.email == email))
        assert found is not None
        return found


def trail(data_dir: Path, email: str) -> list[tuple[str, str]]:
    with committed_session(Settings(data_dir=data_dir)) as s:
        uid = s.scalar(select(User.id).where(User.email == email))
        return [
            (e.actor_label, e.action)
            for e in s.scalars(
                select(AuditEvent)
                .where(AuditEvent.object_type == "user", AuditEvent.object_id == str(uid))
                .order_by(AuditEvent.id)
            )
        ]


def test_account_commands_change_and_audit(data_dir, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    for email, role in (("ida.admin@example.test", "admin"), ("oren.rev@example.test", "reviewer")):
        code, _, err = run(
            capsys, monkeypatch, "user", "add", "--email", email, "--role", role, stdin=PASSWORD + "\n"
        )
        assert code == 0, err

    code, out, _ = run(capsys, monkeypatch, "user", "list", "--json")
    listed = {u["email"]: u for u in json.loads(out)}
    assert listed["oren.rev@example.test"]["role"] == "reviewer" and listed["oren.rev@example.test"]["active"]

    code, out, _ = run(
        capsys,
        monkeypatch,
        "user",
        "access",
        "--email",
        "OREN.rev@example.test",
        "--role",
        "lead",
        "--adjudicator",
    )
    assert code == 0 and "now lead with the adjudicator permission" in out
    u = user(data_dir, "oren.rev@example.test")
    assert (u.role, u.is_adjudicator) == ("lead", True)
    code, out, _ = run(
        capsys, monkeypatch, "user", "access", "--email", "oren.rev@example.test", "--adjudicator"
    )
    assert code == 0 and "already was lead" in out

    code, out, _ = run(capsys, monkeypatch, "user", "deactivate", "--email", "oren.rev@example.test")
    assert code == 0 and "deactivated" in out
    assert not user(data_dir, "oren.rev@example.test").active
    code, out, _ = run(capsys, monkeypatch, "user", "reactivate", "--email", "oren.rev@example.test")
    assert code == 0 and user(data_dir, "oren.rev@example.test").active

    code, out, _ = run(capsys, monkeypatch, "user", "reset-password", "--email", "oren.rev@example.test")
    assert code == 0
    temporary = out.strip().splitlines()[-1]
    u = user(data_dir, "oren.rev@example.test")
    assert verify_password(u.password_hash, temporary) and not verify_password(u.password_hash, PASSWORD)
    assert u.must_change_password

    assert trail(data_dir, "oren.rev@example.test") == [
        ("cli", "user.create"),
        ("cli", "user.access_change"),
        ("cli", "user.deactivate"),
        ("cli", "user.reactivate"),
        ("cli", "user.password_set"),
    ]


def test_cli_keeps_the_last_admin_and_names_unknown_accounts(data_dir, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    code, _, err = run(
        capsys,
        monkeypatch,
        "user",
        "add",
        "--email",
        "solo@example.test",
        "--role",
        "admin",
        stdin=PASSWORD + "\n",
    )
    assert code == 0, err
    code, _, err = run(capsys, monkeypatch, "user", "deactivate", "--email", "solo@example.test")
    assert code == 2 and "last active admin" in err
    code, _, err = run(
        capsys, monkeypatch, "user", "access", "--email", "solo@example.test", "--role", "lead"
    )
    assert code == 2 and "last active admin" in err
    u = user(data_dir, "solo@example.test")
    assert u.active and u.role == "admin"
    code, _, err = run(capsys, monkeypatch, "user", "deactivate", "--email", "nobody@example.test")
    assert code == 2 and "no staff account with e-mail nobody@example.test" in err
    with pytest.raises(SystemExit) as exc:
        cli.main(["user", "access", "--email", "solo@example.test", "--role", "overlord"])
    assert exc.value.code == 2
