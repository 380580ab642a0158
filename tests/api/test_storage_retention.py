"""Clips of alerts with no home's consent behind them (unassigned, or a home with no consent on
record) are purged after their trial's ``unassigned_clip_retention_days`` (default 30)."""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import select

from server.devices.clipstore import ClipStore
from server.devices.models import Clip
from server.households import erasure
from server.settings import Settings
from tests import factories
from tests.conftest import committed_session

NOW = dt.datetime.now(dt.UTC).replace(microsecond=0)


def ago(days: float) -> dt.datetime:
    return NOW - dt.timedelta(days=days)


def test_new_trials_keep_clips_with_no_home_for_30_days(session, trial) -> None:  # type: ignore[no-untyped-def]
    assert trial.unassigned_clip_retention_days == 30


def test_clips_with_no_home_are_purged_after_the_trials_limit(  # type: ignore[no-untyped-def]
    session, settings, store, trial
) -> None:
    loose, _ = factories.make_device(session, trial)  # installed nowhere
    placed, _ = factories.make_device(session, trial)
    consented = factories.make_installed_home(
        session, trial, placed, installed_at=ago(100), retention_days=90
    )
    unconsented_dev, _ = factories.make_device(session, trial)
    no_consent = factories.make_home(session, trial)  # a home with no consent on record
    factories.make_installation(session, unconsented_dev, no_consent, installed_at=ago(100))

    def alert(device, days):  # type: ignore[no-untyped-def]
        return factories.make_alert(session, store, settings, device, detected_at=ago(days), now=ago(days))

    old_loose, fresh_loose = alert(loose, 31), alert(loose, 29)
    old_unconsented = alert(unconsented_dev, 45)
    home_alert = alert(placed, 45)  # the home's own consent (90 days) rules it
    assert (old_loose.home_id, home_alert.home_id) == (None, consented.id)

    dry = erasure.purge_clips(session, store, now=NOW)
    assert sorted((i.clip_id, i.reason) for i in dry.items) == sorted(
        [(old_loose.clip_id, "no_home"), (old_unconsented.clip_id, "no_home")]
    )
    assert dry.waiting_no_home == 1 and dry.by_reason == {"private": 0, "retention": 0, "no_home": 2}
    done = erasure.purge_clips(session, store, now=NOW, apply=True)
    assert done.deleted == 2
    assert not store.exists(old_loose.clip.storage_key) and not store.exists(old_unconsented.clip.storage_key)
    assert store.exists(fresh_loose.clip.storage_key) and store.exists(home_alert.clip.storage_key)
    assert session.get(Clip, old_loose.clip_id).erased_reason == "no_home"  # type: ignore[union-attr]

    # A longer limit keeps them longer; the clip still inside it is counted as waiting.
    trial.unassigned_clip_retention_days = 60
    session.flush()
    later = alert(loose, 50)
    assert erasure.purge_clips(session, store, now=NOW).items == ()
    assert erasure.purge_clips(session, store, now=NOW + dt.timedelta(days=11)).by_reason["no_home"] == 1
    assert store.exists(later.clip.storage_key)


def test_a_clip_shared_with_a_home_waits_for_both_rules(  # type: ignore[no-untyped-def]
    session, settings, store, trial
) -> None:
    loose, _ = factories.make_device(session, trial)
    placed, _ = factories.make_device(session, trial)
    factories.make_installed_home(session, trial, placed, installed_at=ago(100), retention_days=90)
    same = factories.sine_wav(seed=3131)
    a = factories.make_alert(session, store, settings, loose, detected_at=ago(40), now=ago(40), clip=same)
    b = factories.make_alert(session, store, settings, placed, detected_at=ago(40), now=ago(40), clip=same)
    assert a.clip_id == b.clip_id
    assert erasure.purge_clips(session, store, now=NOW).items == ()  # the home's 90 days are not over
    items = erasure.purge_clips(session, store, now=NOW + dt.timedelta(days=51)).items
    assert [(i.clip_id, i.reason) for i in items] == [(a.clip_id, "no_home")]


def test_storage_purge_command_removes_clips_with_no_home(
    fresh_settings: Settings, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    from server import cli

    store = ClipStore(fresh_settings.clip_dir)
    store.ensure()
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        device, _ = factories.make_device(s, trial)
        old = factories.make_alert(s, store, fresh_settings, device, detected_at=ago(40), now=ago(40))
        young = factories.make_alert(s, store, fresh_settings, device, detected_at=ago(2), now=ago(2))
        old_clip, old_key, young_key = old.clip_id, old.clip.storage_key, young.clip.storage_key
    monkeypatch.setenv("TRIALHOUSE_DATA_DIR", str(fresh_settings.data_dir))
    monkeypatch.setenv("TRIALHOUSE_DATABASE_URL", fresh_settings.resolved_database_url())
    assert cli.main(["storage", "purge"]) == 0
    out = capsys.readouterr().out
    assert f"would remove clip {old_clip} (no_home" in out and "1 with no home past the trial's limit" in out
    assert "1 clip(s) with no home kept until" in out
    assert cli.main(["storage", "purge", "--apply", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["deleted"] == 1 and report["waiting_no_home"] == 1
    assert [(i["clip_id"], i["reason"]) for i in report["items"]] == [(old_clip, "no_home")]
    assert not store.exists(old_key) and store.exists(young_key)
    with committed_session(fresh_settings) as s:
        assert s.scalar(select(Clip.erased_reason).where(Clip.id == old_clip)) == "no_home"
