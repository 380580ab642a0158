"""The server refuses a placeholder or short secret key; the password rule (12+ characters, not a
commonly used password) applies wherever a password is set."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from sqlalchemy.orm import Session

from server import cli
from server.app import create_app
from server.auth import service as auth_service
from server.auth.passwords import common_passwords
from server.errors import ValidationFailed
from server.settings import InsecureSecretKey, Settings
from tests import factories

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize(
    "key", ["change-me", "CHANGE_ME", "changeme-please", "secret", "your-secret-key-here", "x" * 31, "é" * 15]
)
def test_placeholder_or_short_keys_are_refused_at_start(tmp_path: Path, key: str) -> None:
    with pytest.raises(InsecureSecretKey) as info:
        create_app(Settings(data_dir=tmp_path, secret_key=key), check_schema=False)
    assert "\n" not in info.value.message and "TRIALHOUSE_SECRET_KEY" in info.value.message
    assert "secrets.token_urlsafe" in info.value.message


def test_a_long_random_key_or_the_generated_one_is_accepted(tmp_path: Path) -> None:
    assert create_app(Settings(data_dir=tmp_path / "a", secret_key="k" * 32), check_schema=False)
    generated = Settings(data_dir=tmp_path / "b")
    create_app(generated, check_schema=False)
    key = (tmp_path / "b" / "secret_key").read_text().strip()
    assert len(key) >= 64 and generated.resolved_secret_key() == key
    assert (tmp_path / "b" / "secret_key").stat().st_mode & 0o777 == 0o600


def test_serve_exits_with_one_line_on_a_placeholder_key(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "change-me")
    assert cli.main(["serve", "--port", "1"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("trialhouse: TRIALHOUSE_SECRET_KEY is a placeholder")


def test_the_deploy_example_carries_no_usable_placeholder() -> None:
    text = (ROOT / "deploy" / "trialhouse.env.example").read_text()
    for m in re.finditer(r"^TRIALHOUSE_SECRET_KEY=(.*)$", text, re.M):
        with pytest.raises(InsecureSecretKey):
            Settings(
                secret_key=m.group(1).strip() or "unset", data_dir=Path("/nonexistent")
            ).resolved_secret_key()


def test_the_common_password_list_ships_with_the_package() -> None:
    words = common_passwords()
    assert len(words) > 300
    assert {"password1234", "qwertyuiop123", "letmein12345"} <= words
    assert factories.PASSWORD not in words


@pytest.mark.parametrize(
    ("password", "fragment"),
    [
        ("eleven char", "at least 12 characters"),
        ("Password1234", "commonly used"),
        ("QWERTYUIOP123", "commonly used"),
        ("  letmein12345  ", "commonly used"),
    ],
)
def test_the_password_rule(password: str, fragment: str) -> None:
    with pytest.raises(ValidationFailed) as info:
        auth_service.check_password_rule(password)
    assert fragment in info.value.errors["password"]


def test_the_rule_applies_when_creating_a_user(session: Session) -> None:
    with pytest.raises(ValidationFailed) as info:
        auth_service.create_user(
            session, email="new@example.test", name="New", role="lead", password="password2026"
        )
    assert "commonly used" in info.value.errors["password"]
    auth_service.check_password_rule("twelve chars")  # exactly 12, not on the list: fine
    user = auth_service.create_user(
        session, email="new@example.test", name="New", role="lead", password="twelve chars"
    )
    assert user.id and auth_service.authenticate(session, "new@example.test", "twelve chars") is user


def test_cli_user_add_applies_the_rule(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    import io

    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "cli-secret-" + "q" * 32)
    monkeypatch.setattr("sys.stdin", io.StringIO("iloveyou1234\n"))
    assert cli.main(["user", "add", "--email", "sam@example.test", "--role", "lead"]) == 2
    assert "commonly used" in capsys.readouterr().err
