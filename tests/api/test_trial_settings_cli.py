"""A trial's target and disturbance window, set at creation or later from the command line, audited."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import select

from server.auth.models import AuditEvent
from server.trials.models import Trial
from tests.api.test_cli import data_dir, run, settings_for  # noqa: F401  (fixture)
from tests.conftest import committed_session


def test_trial_add_and_set_change_the_window_and_target(
    data_dir: Path,  # noqa: F811
    capsys: pytest.CaptureFixture[str],
) -> None:
    code, _, err = run(
        capsys,
        "trial",
        "add",
        "--code",
        "AUTUMN-7",
        "--sound-classes",
        "smoke_alarm",
        "--disturbance-window",
        "90",
    )
    assert code == 0, err
    code, out, err = run(capsys, "trial", "set", "autumn-7", "--target", "0.5", "--disturbance-window", "120")
    assert code == 0, err
    assert "fa_target_per_home_month 1 -> 0.5" in out and "disturbance_window_s 90 -> 120" in out
    code, out, _ = run(capsys, "trial", "set", "AUTUMN-7", "--disturbance-window", "120")
    assert code == 0 and "nothing changed" in out
    with committed_session(settings_for(data_dir)) as s:
        trial = s.scalars(select(Trial).where(Trial.code == "AUTUMN-7")).one()
        assert (trial.fa_target_per_home_month, trial.disturbance_window_s) == (0.5, 120.0)
        events = s.scalars(select(AuditEvent).where(AuditEvent.action == "trial.settings")).all()
        assert len(events) == 1  # the second call changed nothing and recorded nothing


def test_trial_set_refuses_bad_values(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:  # noqa: F811
    assert run(capsys, "trial", "add", "--code", "AUTUMN-8", "--sound-classes", "smoke_alarm")[0] == 0
    code, _, err = run(capsys, "trial", "set", "AUTUMN-8", "--disturbance-window", "-5")
    assert code == 2 and "0 to 3600 seconds" in err
    code, _, err = run(capsys, "trial", "set", "AUTUMN-8", "--target", "0")
    assert code == 2 and "positive rate" in err
    code, _, err = run(capsys, "trial", "set", "AUTUMN-8")
    assert code == 2 and "--disturbance-window" in err
    code, _, err = run(capsys, "trial", "set", "NOPE-1", "--target", "1")
    assert code != 0 and "NOPE-1" in err
