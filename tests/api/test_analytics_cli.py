"""`trialhouse report weekly` on a committed database of each backend."""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import pytest

from server import cli
from server.devices.clipstore import ClipStore
from server.devices.models import ListeningSegment
from server.settings import Settings
from tests import factories
from tests.conftest import committed_session

UTC = dt.UTC
W0 = dt.datetime(2026, 9, 28, tzinfo=UTC)


@pytest.fixture
def pilot(fresh_settings: Settings, monkeypatch: pytest.MonkeyPatch) -> Settings:
    monkeypatch.setenv("TRIALHOUSE_DATABASE_URL", fresh_settings.resolved_database_url())
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(fresh_settings.data_dir))
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "cli-test-secret-" + "r" * 32)
    store = ClipStore(fresh_settings.clip_dir)
    store.ensure()
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(
            s, code="BRAMBLE", name="Bramble Row pilot", starts_on=dt.date(2026, 9, 7)
        )
        device, _ = factories.make_device(s, trial)
        factories.make_installed_home(s, trial, device, installed_at=dt.datetime(2026, 9, 7, 9, tzinfo=UTC))
        s.add(
            ListeningSegment(
                device_id=device.id, started_at=W0, ended_at=W0 + dt.timedelta(days=7), is_open=False
            )
        )
        for k in range(2):
            when = W0 + dt.timedelta(days=1, hours=k)
            a = factories.make_alert(
                s, store, fresh_settings, device, detected_at=when, now=when + dt.timedelta(minutes=1)
            )
            a.state, a.final_label, a.final_cause, a.final_method = (
                "final",
                "false_alarm",
                "appliance",
                "single",
            )
    return fresh_settings


def test_report_weekly_writes_a_self_contained_html_file(
    pilot: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "summary.html"
    assert cli.main(["report", "weekly", "--trial", "BRAMBLE", "--week", "2026-W40", "--out", str(out)]) == 0
    assert "2026-W40" in capsys.readouterr().out
    html = out.read_text(encoding="utf-8")
    assert html.startswith("<!doctype html>") and html.count("<svg") >= 3
    assert "not a certified life-safety device" in html and "Bramble Row pilot" in html
    # Self-contained: no attribute points outside the file (chart parts refer to "#ids" inside it).
    assert re.findall(r'(?:src|href)="(?!#)', html) == []
    assert "<link" not in html


def test_report_weekly_as_json(pilot: Settings, tmp_path: Path) -> None:
    out = tmp_path / "summary.json"
    assert (
        cli.main(
            [
                "report",
                "weekly",
                "--trial",
                "BRAMBLE",
                "--week",
                "2026-W40",
                "--out",
                str(out),
                "--format",
                "json",
            ]
        )
        == 0
    )
    js = json.loads(out.read_text(encoding="utf-8"))
    smoke = next(c for c in js["classes"] if c["sound_class"] == "smoke_alarm")["week"]
    assert smoke["rate"]["events"] == 2
    assert smoke["home_months"] == pytest.approx(7 / 30.4375)
    assert smoke["causes"][0]["cause"] == "appliance"


def test_report_weekly_refuses_an_unknown_trial(
    pilot: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert cli.main(["report", "weekly", "--trial", "NOPE", "--out", str(tmp_path / "x.html")]) == 2
    assert "No trial has code NOPE" in capsys.readouterr().err
    assert not (tmp_path / "x.html").exists()
