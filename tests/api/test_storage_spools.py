"""Upload spools left by a crash: removed at start-up, reported and repaired by `storage check`,
removed by `storage purge --apply`; an upload in flight (a young spool) is never touched."""

from __future__ import annotations

import hashlib
import json
import os
import time

import pytest
from fastapi.testclient import TestClient

from server.app import create_app
from server.devices.clipstore import ClipStore
from server.households import erasure
from server.settings import Settings
from tests import factories
from tests.conftest import committed_session

HOUR_AGO = time.time() - 3600


def crashed_spool(store: ClipStore, data: bytes, *, mtime: float | None = HOUR_AGO) -> str:
    """An upload that streamed into its spool and then lost its process: never discarded."""
    up = store.spool()
    up.write(data)
    up.finish()
    if mtime is not None:
        os.utime(up.path, (mtime, mtime))
    return f"tmp/{up.path.name}"


def cli(
    argv: list[str], settings: Settings, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> tuple[int, str]:
    from server import cli as cli_module

    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(settings.data_dir))
    monkeypatch.setenv("TRIALHOUSE_DATABASE_URL", settings.resolved_database_url())
    code = cli_module.main(argv)
    return code, capsys.readouterr().out


def test_start_up_removes_abandoned_spools_and_leaves_young_ones(fresh_settings: Settings) -> None:
    store = ClipStore(fresh_settings.clip_dir)
    store.ensure()
    old = crashed_spool(store, factories.sine_wav(seed=1))
    young = crashed_spool(store, factories.sine_wav(seed=2), mtime=None)  # another worker's upload
    assert store.path(old).exists() and store.path(young).exists()
    with TestClient(create_app(fresh_settings)) as c:
        assert c.get("/api/v1/health").status_code == 200
    assert not store.path(old).exists()
    assert store.path(young).exists()
    assert store.stale_spools() == []


def test_storage_check_reports_spools_and_orphans_and_repair_removes_them(
    fresh_settings: Settings, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        device, _ = factories.make_device(s, trial)
        store = ClipStore(fresh_settings.clip_dir)
        store.ensure()
        kept = factories.make_alert(s, store, fresh_settings, device)
        kept_key = kept.clip.storage_key
    spool = crashed_spool(store, factories.sine_wav(seed=3))
    orphan_sha = hashlib.sha256(b"left by a crash").hexdigest()
    orphan = ClipStore.key_for(orphan_sha)
    store.path(orphan).parent.mkdir(parents=True, exist_ok=True)
    store.path(orphan).write_bytes(b"left by a crash")
    os.utime(store.path(orphan), (HOUR_AGO, HOUR_AGO))
    young_sha = hashlib.sha256(b"renamed a moment ago").hexdigest()
    young = ClipStore.key_for(young_sha)
    store.path(young).parent.mkdir(parents=True, exist_ok=True)
    store.path(young).write_bytes(b"renamed a moment ago")

    code, out = cli(["storage", "check", "--json"], fresh_settings, monkeypatch, capsys)
    report = json.loads(out)
    assert code == 1
    assert (report["rows"], report["spools"], report["orphans"]) == (1, [spool], sorted([orphan, young]))
    code, out = cli(["storage", "check"], fresh_settings, monkeypatch, capsys)
    assert code == 1
    assert f"upload spool left by a crash (raw audio): {spool}" in out and "--repair" in out

    code, out = cli(["storage", "check", "--repair"], fresh_settings, monkeypatch, capsys)
    assert f"removed upload spool: {spool}" in out and f"removed orphan file: {orphan}" in out
    assert f"left alone (written in the last 10 minutes): {young}" in out
    assert code == 1  # the young orphan is still there
    assert not store.path(spool).exists() and not store.path(orphan).exists()
    assert store.path(young).exists() and store.exists(kept_key)

    os.utime(store.path(young), (HOUR_AGO, HOUR_AGO))
    code, out = cli(["storage", "check", "--repair", "--json"], fresh_settings, monkeypatch, capsys)
    assert code == 0 and json.loads(out)["repair"]["orphans_removed"] == [young]
    code, out = cli(["storage", "check"], fresh_settings, monkeypatch, capsys)
    assert code == 0 and out.strip().endswith("ok")
    assert sorted(store.iter_keys()) == [kept_key]


def test_purge_lists_spools_and_removes_them_when_applied(session, store, trial) -> None:  # type: ignore[no-untyped-def]
    spool = crashed_spool(store, factories.sine_wav(seed=4))
    young = crashed_spool(store, factories.sine_wav(seed=5), mtime=None)
    dry = erasure.purge_clips(session, store)
    assert dry.spools == (spool,) and store.path(spool).exists()
    done = erasure.purge_clips(session, store, apply=True)
    assert done.spools == (spool,)
    assert not store.path(spool).exists() and store.path(young).exists()
    assert erasure.purge_clips(session, store).spools == ()
