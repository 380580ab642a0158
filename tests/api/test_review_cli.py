"""`trialhouse review overview` on a committed SQLite database in a temporary data directory."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest

from server import cli, cli_base
from server.devices.clipstore import ClipStore
from server.devices.models import AlertState
from server.review.models import Verdict
from server.settings import Settings
from tests import factories
from tests.conftest import committed_session


def test_review_overview_command(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path / "var"))
    monkeypatch.delenv("TRIALHOUSE_DATABASE_URL", raising=False)
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "cli-test-secret-" + "k" * 32)
    settings = Settings()
    cli_base.open_db(settings)
    store = ClipStore(settings.clip_dir)
    store.ensure()
    now = dt.datetime.now(dt.UTC)
    with committed_session(settings) as s:
        trial = factories.make_trial(s)
        device, _ = factories.make_device(s, trial)
        alerts = [
            factories.make_alert(s, store, settings, device, now=now - dt.timedelta(hours=3 - i))
            for i in range(3)
        ]
        r1 = factories.make_user(s, role="reviewer", name="Una Reviewer")[0]
        r2 = factories.make_user(s, role="reviewer", name="Dara Reviewer")[0]
        s.add(Verdict(alert_id=alerts[0].id, reviewer_id=r1.id, round=1, label="confirmed"))
        s.add(
            Verdict(
                alert_id=alerts[0].id,
                reviewer_id=r2.id,
                round=2,
                label="false_alarm",
                cause="dog",
                resemblance="unrelated",
            )
        )
        alerts[0].state = AlertState.adjudication
        code = trial.code
    assert cli.main(["review", "overview", "--trial", code, "--json"]) == 0
    body = json.loads(capsys.readouterr().out)
    assert body["backlog"]["count"] == 3 and body["by_state"]["adjudication"] == 1
    assert body["double_reviewed"] == 1 and body["percent_agreement"]["estimate"] == 0.0
    assert body["backlog"]["oldest_age_s"] == pytest.approx(3 * 3600, abs=120)
    assert cli.main(["review", "overview"]) == 0
    out = capsys.readouterr().out
    assert "backlog: 3 alert(s)" in out and "Una Reviewer: 1 verdict(s)" in out
    assert cli.main(["review", "overview", "--trial", "NOPE"]) != 0
