"""The `trialhouse` command line in-process (``server.cli.main``), the start-up schema check, and the
device simulator. SQLite in a temporary data directory is enough here.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import json
import sys
from pathlib import Path
from typing import Any

import httpx2
import pytest
from alembic import command
from fastapi.testclient import TestClient
from sqlalchemy import select, text

from server import cli, migrate, simulate
from server.app import create_app
from server.auth import service as auth_service
from server.db import make_engine
from server.devices.models import Alert, Device
from server.settings import Settings
from server.tokens import token_digest
from tests import factories
from tests.conftest import committed_session


@pytest.fixture
def data_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    d = tmp_path / "var"
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(d))
    monkeypatch.delenv("TRIALHOUSE_DATABASE_URL", raising=False)
    monkeypatch.setenv("TRIALHOUSE_SECRET_KEY", "cli-test-secret-" + "k" * 32)
    return d


def run(
    capsys: pytest.CaptureFixture[str],
    *argv: str,
    stdin: str | None = None,
    monkeypatch: pytest.MonkeyPatch | None = None,
) -> tuple[int, str, str]:
    if stdin is not None:
        assert monkeypatch is not None
        monkeypatch.setattr(sys, "stdin", io.StringIO(stdin))
    code = cli.main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def run_bad(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str]:
    """Arguments argparse refuses: it exits with status 2 and a usage line."""
    with pytest.raises(SystemExit) as exc:
        cli.main(list(argv))
    return int(exc.value.code or 0), capsys.readouterr().err


def settings_for(data_dir: Path) -> Settings:
    return Settings(data_dir=data_dir)


# --- devices ----------------------------------------------------------------------------------


def test_device_add_works_on_a_fresh_data_directory_and_prints_the_token_once(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert not data_dir.exists()
    code, out, err = run(capsys, "device", "add", "--serial", "KX-0001", "--json")
    assert code == 0, err
    obj = json.loads(out)
    assert obj["serial"] == "KX-0001" and obj["trial"] == "PILOT-1"
    token = obj["token"]
    assert token.startswith("thd_") and len(token) >= 4 + 43  # 32 random bytes, URL-safe base64
    with committed_session(settings_for(data_dir)) as s:
        dev = s.scalar(select(Device).where(Device.serial == "KX-0001"))
        assert dev is not None and dev.token_hash == token_digest(token)
        assert token not in json.dumps({c.name: str(getattr(dev, c.name)) for c in Device.__table__.columns})
        trial_classes = s.execute(text("SELECT sound_classes FROM trial")).scalar_one()
    assert set(json.loads(trial_classes) if isinstance(trial_classes, str) else trial_classes) == {
        "smoke_alarm",
        "baby_cry",
        "glass_break",
    }
    code, out, _ = run(capsys, "device", "list")
    assert code == 0 and "KX-0001" in out and token not in out
    code, out, _ = run(capsys, "device", "list", "--json")
    assert token not in out and [d["serial"] for d in json.loads(out)] == ["KX-0001"]


def test_device_add_without_json_prints_a_readable_token_line(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run(capsys, "device", "add", "--serial", "KX-0002", "--hardware-model", "HX-2")
    assert code == 0
    assert "device KX-0002 registered in trial PILOT-1" in out
    line = [ln for ln in out.splitlines() if ln.startswith("token")]
    assert len(line) == 1 and line[0].split()[-1].startswith("thd_")


def test_device_add_refuses_a_taken_serial_and_an_unknown_trial(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert run(capsys, "device", "add", "--serial", "KX-0003")[0] == 0
    code, out, err = run(capsys, "device", "add", "--serial", "KX-0003")
    assert code != 0 and "already registered" in err and "thd_" not in out
    code, _, err = run(capsys, "device", "add", "--serial", "KX-0004", "--trial", "NOPE-9")
    assert code != 0 and "No trial has code NOPE-9" in err


def test_device_add_into_a_named_trial(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(
        capsys,
        "trial",
        "add",
        "--code",
        "WINTER-2",
        "--sound-classes",
        "smoke_alarm,co_alarm",
        "--starts-on",
        "2026-01-05",
    )
    assert code == 0, err
    code, out, _ = run(capsys, "device", "add", "--serial", "KX-0005", "--trial", "winter-2", "--json")
    assert code == 0 and json.loads(out)["trial"] == "WINTER-2"
    code, out, _ = run(capsys, "trial", "list")
    assert "WINTER-2" in out and "smoke_alarm,co_alarm" in out


def test_device_revoke(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _, out, _ = run(capsys, "device", "add", "--serial", "KX-0006", "--json")
    token = json.loads(out)["token"]
    code, out, _ = run(capsys, "device", "revoke", "--serial", "KX-0006")
    assert code == 0 and "device KX-0006 revoked" in out
    _, out, _ = run(capsys, "device", "list")
    assert "revoked" in out.splitlines()[0]
    code, _, err = run(capsys, "device", "revoke", "--serial", "KX-9999")
    assert code != 0 and "No device has serial KX-9999" in err
    # The revoked token no longer works on the device API.
    with TestClient(create_app(settings_for(data_dir))) as c:
        r = c.post(
            "/api/v1/heartbeats",
            headers={"Authorization": f"Bearer {token}"},
            json={"sent_at": dt.datetime.now(dt.UTC).isoformat(), "listening": True, "firmware": "1"},
        )
        assert r.status_code == 403 and r.json()["error"]["code"] == "device_revoked"


# --- alerts and storage -----------------------------------------------------------------------


def _post_alerts(data_dir: Path, token: str, n: int) -> list[bytes]:
    clips = []
    with TestClient(create_app(settings_for(data_dir))) as c:
        for i in range(n):
            clip = factories.sine_wav(seed=200 + i)
            meta = {
                "event_id": f"cli-{i}",
                "sound_class": "glass_break",
                "score": 0.7,
                "detected_at": dt.datetime.now(dt.UTC).isoformat(),
                "clip_offset_s": 0.1,
                "firmware": "1",
            }
            r = c.post(
                "/api/v1/alerts",
                headers={"Authorization": f"Bearer {token}"},
                files={"meta": (None, json.dumps(meta)), "clip": ("c.wav", clip, "audio/wav")},
            )
            assert r.status_code == 201, r.text
            clips.append(clip)
    return clips


def test_alert_list_json_gives_every_alert_with_its_clip_digest(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _, out, _ = run(capsys, "device", "add", "--serial", "KX-0007", "--json")
    clips = _post_alerts(data_dir, json.loads(out)["token"], 3)
    code, out, _ = run(capsys, "alert", "list", "--json")
    assert code == 0
    rows = json.loads(out)
    assert sorted(r["event_id"] for r in rows) == ["cli-0", "cli-1", "cli-2"]
    assert {r["event_id"]: r["clip_sha256"] for r in rows} == {
        f"cli-{i}": hashlib.sha256(c).hexdigest() for i, c in enumerate(clips)
    }
    assert all(r["device"] == "KX-0007" and r["home"] is None for r in rows)
    code, out, _ = run(capsys, "alert", "list")
    assert code == 0 and len(out.strip().splitlines()) == 3
    assert all("\tunassigned\t" in ln for ln in out.splitlines())
    assert {ln.split("\t")[-1] for ln in out.splitlines()} == {hashlib.sha256(c).hexdigest() for c in clips}


def test_storage_check_reports_ok(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _, out, _ = run(capsys, "device", "add", "--serial", "KX-0008", "--json")
    _post_alerts(data_dir, json.loads(out)["token"], 2)
    code, out, _ = run(capsys, "storage", "check")
    assert code == 0
    assert "clips in database: 2, files in store: 2" in out and out.strip().endswith("ok")


# --- users ------------------------------------------------------------------------------------


def test_user_add_reads_the_password_from_stdin(
    data_dir: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    code, out, err = run(
        capsys,
        "user",
        "add",
        "--email",
        "Rita@Example.TEST",
        "--role",
        "reviewer",
        stdin="a long enough secret\n",
        monkeypatch=monkeypatch,
    )
    assert code == 0, err
    assert "user rita@example.test added with role reviewer" in out
    assert "a long enough secret" not in out + err
    with committed_session(settings_for(data_dir)) as s:
        assert auth_service.authenticate(s, "rita@example.test", "a long enough secret") is not None
        assert auth_service.authenticate(s, "rita@example.test", "a long enough secret\n") is None
    code, _, err = run(
        capsys,
        "user",
        "add",
        "--email",
        "rita@example.test",
        "--role",
        "lead",
        stdin="another long secret\n",
        monkeypatch=monkeypatch,
    )
    assert code != 0 and "already exists" in err


def test_user_add_refuses_a_short_password_and_a_bad_email(
    data_dir: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    code, _, err = run(
        capsys,
        "user",
        "add",
        "--email",
        "sam@example.test",
        "--role",
        "lead",
        stdin="short\n",
        monkeypatch=monkeypatch,
    )
    assert code != 0 and "at least 12 characters" in err
    code, _, err = run(
        capsys,
        "user",
        "add",
        "--email",
        "not-an-address",
        "--role",
        "lead",
        stdin="long enough password\n",
        monkeypatch=monkeypatch,
    )
    assert code != 0 and "is not an e-mail address" in err


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["user", "add", "--email", "a@b.test", "--role", "superuser"], "invalid choice: 'superuser'"),
        (["user", "add", "--role", "lead"], "the following arguments are required: --email"),
        (["device", "add"], "the following arguments are required: --serial"),
        (["device", "explode"], "invalid choice: 'explode'"),
        (["frobnicate"], "invalid choice: 'frobnicate'"),
        ([], "the following arguments are required: COMMAND"),
        (["serve", "--port", "eighty"], "invalid int value: 'eighty'"),
        (
            ["trial", "add", "--code", "X1", "--sound-classes", "a_b", "--target", "lots"],
            "invalid float value",
        ),
    ],
)
def test_bad_arguments_exit_non_zero_with_a_clear_message(
    argv: list[str], message: str, data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, err = run_bad(capsys, *argv)
    assert code == 2
    assert message in err and "usage: trialhouse" in err


def test_bad_values_exit_non_zero_with_a_clear_message(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, _, err = run(
        capsys,
        "trial",
        "add",
        "--code",
        "SPRING-3",
        "--sound-classes",
        "smoke_alarm",
        "--starts-on",
        "3 March",
    )
    assert code == 2 and "Dates are YYYY-MM-DD" in err
    code, _, err = run(capsys, "trial", "add", "--code", "x", "--sound-classes", "Smoke Alarm")
    assert code == 2 and err.startswith("trialhouse: ")


# --- schema -----------------------------------------------------------------------------------


def test_db_upgrade_is_idempotent(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    url = f"sqlite:///{tmp_path / 'up.sqlite'}"
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path / "var"))
    monkeypatch.setenv("TRIALHOUSE_DATABASE_URL", url)
    head = migrate.head_revision()
    code, out, _ = run(capsys, "db", "upgrade")
    assert code == 0 and out.strip() == f"database at revision {head} (was empty)"
    code, out, _ = run(capsys, "db", "upgrade")
    assert code == 0 and out.strip() == f"database at revision {head}"
    engine = make_engine(url)
    try:
        assert migrate.current_revision(engine) == head
        migrate.check_schema(engine)
    finally:
        engine.dispose()


def test_cli_refuses_an_unmigrated_database_it_does_not_own(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(tmp_path / "var"))
    monkeypatch.setenv("TRIALHOUSE_DATABASE_URL", f"sqlite:///{tmp_path / 'empty.sqlite'}")
    code, _, err = run(capsys, "device", "list")
    assert code == 2 and "trialhouse db upgrade" in err and "has no Trialhouse schema" in err


def test_server_refuses_to_start_on_an_unmigrated_database(tmp_path: Path) -> None:
    s = Settings(
        data_dir=tmp_path / "var", database_url=f"sqlite:///{tmp_path / 'empty.sqlite'}", secret_key="s" * 40
    )
    app = create_app(s)
    with pytest.raises(migrate.SchemaOutOfDate) as exc:
        with TestClient(app):
            pass
    assert "trialhouse db upgrade" in str(exc.value) and "has no Trialhouse schema" in str(exc.value)


def test_server_refuses_to_start_on_an_older_schema(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'old.sqlite'}"
    engine = make_engine(url)
    cfg = migrate.alembic_config()
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0001")
    engine.dispose()
    app = create_app(Settings(data_dir=tmp_path / "var", database_url=url, secret_key="s" * 40))
    with pytest.raises(migrate.SchemaOutOfDate) as exc:
        with TestClient(app):
            pass
    assert "is at schema revision 0001" in str(exc.value) and "trialhouse db upgrade" in str(exc.value)


# --- the simulator ----------------------------------------------------------------------------


class FlakyTransport(httpx2.BaseTransport):
    """Times out once on the first alert upload: before it reaches the server, or after it was stored."""

    def __init__(self, inner: httpx2.BaseTransport, *, after_delivery: bool) -> None:
        self.inner, self.after_delivery, self.failed, self.delivered = inner, after_delivery, False, 0

    def handle_request(self, request: httpx2.Request) -> httpx2.Response:
        if request.url.path == "/api/v1/alerts":
            self.delivered += 1
            if not self.failed:
                self.failed = True
                if self.after_delivery:
                    response = self.inner.handle_request(request)
                    response.read()  # the server stored it; the answer is lost on the way back
                raise httpx2.ReadTimeout("simulated timeout", request=request)
        return self.inner.handle_request(request)


@pytest.fixture
def sim_app(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> tuple[Any, str]:
    _, out, _ = run(capsys, "device", "add", "--serial", "SIM-1", "--json")
    return create_app(settings_for(data_dir)), json.loads(out)["token"]


def _sleeps(monkeypatch: pytest.MonkeyPatch) -> list[float]:
    slept: list[float] = []
    monkeypatch.setattr(simulate.time, "sleep", slept.append)
    return slept


def test_simulator_posts_heartbeats_and_alerts(sim_app, data_dir: Path) -> None:  # type: ignore[no-untyped-def]
    app, token = sim_app
    rng = __import__("numpy").random.default_rng(4)
    with TestClient(app) as c:
        sim = simulate.DeviceSimulator("http://testserver", token, client=c, firmware="sim-2.0")
        hb = sim.heartbeat()
        assert hb.status == 200 and 54 <= hb.body["next_heartbeat_s"] <= 66
        for kind, cls in (
            ("smoke_alarm_t3", "smoke_alarm"),
            ("baby_cry", "baby_cry"),
            ("glass_break", "glass_break"),
        ):
            clip, offset = simulate.synth_clip(kind, rng)
            r = sim.send_alert(
                clip=clip,
                sound_class=cls,
                score=0.8,
                detected_at=dt.datetime.now(dt.UTC),
                clip_offset_s=offset,
            )
            assert r.status == 201 and r.attempts == 1, r.body
    with committed_session(settings_for(data_dir)) as s:
        alerts = list(s.scalars(select(Alert)))
        assert sorted(a.sound_class for a in alerts) == ["baby_cry", "glass_break", "smoke_alarm"]
        assert all(a.firmware == "sim-2.0" and a.clip.duration_s == pytest.approx(10.0) for a in alerts)


@pytest.mark.parametrize("after_delivery", [False, True])
def test_simulator_retries_a_timeout_with_the_same_event_id(
    after_delivery: bool,
    sim_app,
    data_dir: Path,  # type: ignore[no-untyped-def]
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    app, token = sim_app
    slept = _sleeps(monkeypatch)
    with TestClient(app) as c:
        flaky = FlakyTransport(c._transport, after_delivery=after_delivery)
        c._transport = flaky
        sim = simulate.DeviceSimulator("http://testserver", token, client=c)
        clip = factories.sine_wav(seconds=2.0, seed=300)
        r = sim.send_alert(
            clip=clip,
            sound_class="smoke_alarm",
            score=0.9,
            detected_at=dt.datetime.now(dt.UTC),
            clip_offset_s=1.0,
            event_id="sim-ev-1",
        )
    assert r.attempts == 2 and flaky.delivered == 2 and len(slept) == 1
    # Stored on the first try: the resend is recognised as a duplicate; lost before arrival: stored now.
    assert (r.status, r.body["duplicate"]) == ((200, True) if after_delivery else (201, False))
    with committed_session(settings_for(data_dir)) as s:
        rows = list(s.scalars(select(Alert)))
        assert [a.event_id for a in rows] == ["sim-ev-1"] and rows[0].id == r.body["alert_id"]


def test_simulator_gives_up_after_its_retries(sim_app, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    _, token = sim_app

    def always_timeout(request: httpx2.Request) -> httpx2.Response:
        raise httpx2.ConnectTimeout("no route", request=request)

    slept = _sleeps(monkeypatch)
    sim = simulate.DeviceSimulator(
        "http://sim.invalid",
        token,
        retries=2,
        client=httpx2.Client(base_url="http://sim.invalid", transport=httpx2.MockTransport(always_timeout)),
    )
    with pytest.raises(RuntimeError, match="no answer after 3 attempts"):
        sim.heartbeat()
    assert len(slept) == 3


def test_simulate_command_against_a_live_server(
    live_server,
    capsys: pytest.CaptureFixture[str],  # type: ignore[no-untyped-def]
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    with committed_session(live_server.settings) as s:
        trial = factories.make_trial(s)
        _, token = factories.make_device(s, trial)
    code, out, err = run(
        capsys,
        "simulate",
        "--base-url",
        live_server.url,
        "--token",
        token,
        "--heartbeats",
        "2",
        "--alerts",
        "1",
        "--sound-class",
        "baby_cry",
    )
    assert code == 0, out + err
    assert out.count("heartbeat ") == 2 and "alert 1 (baby_cry): 201" in out
