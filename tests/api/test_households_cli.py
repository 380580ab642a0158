"""`trialhouse home import/export`, `quota show` and `storage purge` on a fresh data directory (SQLite)."""

from __future__ import annotations

import io

import pandas as pd
import pytest
from sqlalchemy import select

from server import cli
from server.auth.models import AuditEvent
from server.quota import service as quota_service
from server.settings import Settings
from server.trials import service as trials_service
from tests.conftest import committed_session


@pytest.fixture
def data_dir(tmp_path, monkeypatch):  # type: ignore[no-untyped-def]
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path / "var"))
    monkeypatch.delenv("TRIALHOUSE_DATABASE_URL", raising=False)
    return tmp_path


def test_cli_register_commands(data_dir, capsys):
    good = data_dir / "homes.csv"
    good.write_text(
        "code,dog,dwelling_type,names\nH-0101,yes,flat,Eve Sample\nH-0102,no,,\n", encoding="utf-8"
    )
    assert cli.main(["home", "import", str(good), "--trial", "PILOT-1"]) == 0
    assert "2 home(s) imported into PILOT-1: H-0101, H-0102" in capsys.readouterr().out

    bad = data_dir / "bad.csv"
    bad.write_text("code,dog\nH-0103,yes\nH-0101,no\nH-0104,often\n", encoding="utf-8")
    assert cli.main(["home", "import", str(bad), "--trial", "PILOT-1"]) == 1
    err = capsys.readouterr().err
    assert "nothing imported: 2 problem(s)" in err
    assert "line 3 (H-0101), column 'code': duplicate code: already in the register" in err
    assert "line 4 (H-0104), column 'dog'" in err

    assert cli.main(["home", "export"]) == 0
    out = capsys.readouterr().out
    frame = pd.read_csv(io.StringIO(out), dtype=str, keep_default_na=False)
    assert list(frame["code"]) == ["H-0101", "H-0102"] and "Eve Sample" not in out and "names" not in frame
    target = data_dir / "with.csv"
    assert cli.main(["home", "export", "--with-personal-data", "-o", str(target)]) == 0
    assert "recorded in the audit trail" in capsys.readouterr().out
    assert "Eve Sample" in target.read_text(encoding="utf-8")

    settings = Settings()
    with committed_session(settings) as s:
        trial = trials_service.get_trial(s, "PILOT-1")
        quota_service.add_target(s, trial, attribute_key="dog", value="yes", min_count=2)
        assert s.scalar(select(AuditEvent).where(AuditEvent.action == "personal.export")) is not None
    assert cli.main(["quota", "show", "--trial", "PILOT-1"]) == 0
    out = capsys.readouterr().out
    # Both homes are candidates: none counts, H-0101 (dog) is the one suggestion.
    assert "Dog: yes: 0 (>= 2) short by 2" in out
    assert "recruit next: H-0101 (Dog: yes)" in out

    assert cli.main(["storage", "purge"]) == 0
    assert "dry run: 0 clip file(s) would be removed" in capsys.readouterr().out
    assert cli.main(["storage", "purge", "--apply"]) == 0
    assert "0 clip file(s) removed" in capsys.readouterr().out
