"""The demo pilot, seeded at a small size in a temporary directory through the real API and services.

One seeding per module (8 homes, 3 weeks); the tests read what it left behind.
"""

from __future__ import annotations

import datetime as dt
import json
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.app import create_app
from server.auth.models import User
from server.cli import main
from server.db import make_engine, make_session_factory
from server.demo import scenario, seed
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, Clip, Device, ListeningSegment
from server.households.models import Home, HomeContact, HomeStateChange
from server.installations.models import Installation
from server.review.models import Verdict
from server.staged.models import StagedEvent
from server.trials.models import Trial
from tests.conftest import sign_in

SMALL = {"homes": 8, "weeks": 3, "seed": 5}
STARTS_ON = dt.date(2026, 3, 2)  # a Monday; fixed so the test does not move with the calendar


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> seed.SeedResult:
    data_dir = tmp_path_factory.mktemp("demo")
    # An earlier demo in the same place is replaced, not merged into.
    (data_dir / seed.MARKER).write_text(json.dumps({"kind": seed.MARKER_KIND, "complete": True}))
    (data_dir / "left-over.txt").write_text("from an earlier demo")
    return seed.seed_demo(data_dir, starts_on=STARTS_ON, **SMALL)


@pytest.fixture
def db(seeded: seed.SeedResult) -> Iterator[Session]:
    engine = make_engine(seeded.settings.resolved_database_url())
    s = make_session_factory(engine)()
    try:
        yield s
    finally:
        s.close()
        engine.dispose()


@pytest.fixture
def app_client(seeded: seed.SeedResult) -> Iterator[TestClient]:
    with TestClient(create_app(seeded.settings)) as c:
        yield c


def home_id(db: Session, code: str) -> int:
    hid = db.scalar(select(Home.id).where(Home.code == code))
    assert hid is not None
    return hid


# --- the data directory ------------------------------------------------------------------------


def test_a_directory_that_is_not_a_demo_is_refused_and_left_alone(tmp_path: Path) -> None:
    (tmp_path / "trialhouse.db").write_text("someone's real pilot")
    with pytest.raises(seed.DemoError, match="not a demo"):
        seed.seed_demo(tmp_path, homes=8, weeks=2)
    assert (tmp_path / "trialhouse.db").read_text() == "someone's real pilot"
    assert not (tmp_path / seed.MARKER).exists()


def test_an_earlier_demo_is_replaced(seeded: seed.SeedResult) -> None:
    data_dir = seeded.settings.data_dir
    assert not (data_dir / "left-over.txt").exists()
    marker = seed.read_marker(data_dir)
    assert marker is not None and marker["complete"] is True and marker["seed"] == SMALL["seed"]
    assert (data_dir / seed.MARKER).stat().st_mode & 0o077 == 0  # it holds the passwords


def test_the_cli_refuses_a_foreign_directory_with_a_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "notes.txt").write_text("keep me")
    assert main(["demo", "--data-dir", str(tmp_path), "--homes", "8", "--weeks", "2", "--no-serve"]) == 2
    assert "not a demo's data directory" in capsys.readouterr().err
    assert (tmp_path / "notes.txt").read_text() == "keep me"


def test_the_cli_prints_a_sign_in_for_each_role_of_a_seeded_demo(
    seeded: seed.SeedResult, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["demo", "--data-dir", str(seeded.settings.data_dir), "--keep", "--no-serve"]) == 0
    out = capsys.readouterr().out
    for s in seeded.sign_ins:
        assert f"{s.email}" in out and s.password in out
    assert [s.label for s in seeded.sign_ins] == [
        "admin",
        "coordinator",
        "reviewer",
        "reviewer",
        "reviewer (adjudicator)",
        "lead",
    ]
    assert all(s.email.endswith("@example.test") for s in seeded.sign_ins)


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--homes", "3"], "--homes must be between 8 and 400"),
        (["--weeks", "0"], "--weeks must be between 2 and 52"),
        (["--starts-on", "2026-02-30"], "--starts-on is YYYY-MM-DD"),
    ],
)
def test_the_cli_rejects_bad_sizes(
    argv: list[str], message: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["demo", "--data-dir", str(tmp_path / "d"), "--no-serve", *argv]) == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "d").exists()


# --- the plan ----------------------------------------------------------------------------------


def test_the_same_seed_gives_the_same_pilot_and_another_seed_another() -> None:
    a = scenario.build_plan(seed=3, homes=12, weeks=4, starts_on=STARTS_ON)
    b = scenario.build_plan(seed=3, homes=12, weeks=4, starts_on=STARTS_ON)
    c = scenario.build_plan(seed=4, homes=12, weeks=4, starts_on=STARTS_ON)
    assert a == b
    assert [d.at for d in a.detections] != [d.at for d in c.detections]


def test_the_default_plan_has_the_scenario_the_issue_asks_for() -> None:
    plan = scenario.build_plan(seed=1, homes=36, weeks=10, starts_on=STARTS_ON)
    installed = [h for h in plan.households if not h.key.startswith("extra-")]
    assert len(installed) == 36 and plan.ends_on - plan.starts_on == dt.timedelta(days=69)
    assert {d.hardware_model for d in plan.devices} == set(scenario.HARDWARE_MODELS)
    assert {d.firmware for d in plan.detections} == {scenario.FIRMWARE_OLD, scenario.FIRMWARE_NEW}
    assert len({p.room for p in plan.placements}) >= 4
    baby_fa = Counter(
        d.home_key for d in plan.detections if d.sound_class == "baby_cry" and d.truth_label == "false_alarm"
    )
    top, n = baby_fa.most_common(1)[0]
    assert top == "cockatoo" and n / sum(baby_fa.values()) > 0.25
    dog_homes = [h for h in installed if "dog" in h.traits]
    assert len(dog_homes) >= 4
    staged_homes = {s.home_key for s in plan.staged}
    assert 0.25 <= len(staged_homes) / 36 <= 0.4
    assert 0 < sum(not s.detected for s in plan.staged) < len(plan.staged) / 2
    assert sum(d.private for d in plan.detections) == 2
    quota_short = [q for q in plan.quota if q.trait == "aged_75"][0]
    assert sum("aged_75" in h.traits for h in installed) < (quota_short.min_count or 0)
    assert plan.works is not None and plan.works[1] - plan.works[0] == dt.timedelta(days=14)
    assert any(o.serial for o in plan.outages if o.reason == "offline overnight")


@pytest.mark.parametrize("kind", ["baby_cry", "bird_screech", "door_slam", "smoke_alarm_t3"])
def test_demo_clips_are_reproducible_and_sit_in_room_tone(kind: str) -> None:
    import io

    import numpy as np
    import soundfile as sf

    clip, offset = seed._make_clip((kind, 1234))
    assert seed._make_clip((kind, 1234)) == (clip, offset)
    x, rate = sf.read(io.BytesIO(clip))
    assert rate == 16000 and len(x) == 160000 and 0.5 < offset < 4.2
    # Before the sound starts: the room tone of server.sounds (-55 dBFS RMS), as the clip's floor.
    start = int((offset - 0.8) * rate)
    quiet = 20 * np.log10(np.sqrt(np.mean(x[: max(start, 1600)] ** 2)))
    loud = 20 * np.log10(np.sqrt(np.mean(x[start:] ** 2)))
    assert quiet == pytest.approx(-55.0, abs=3.0)
    assert loud > quiet + 10.0


# --- the seeded pilot ----------------------------------------------------------------------------


def test_one_trial_with_the_three_classes_and_no_default_pilot(db: Session) -> None:
    trials = list(db.scalars(select(Trial)))
    assert [t.code for t in trials] == [scenario.TRIAL_CODE]
    assert trials[0].sound_classes == list(scenario.SOUND_CLASSES)
    assert trials[0].starts_on == STARTS_ON and trials[0].ends_on == STARTS_ON + dt.timedelta(days=20)


def test_receipts_and_monitored_time_land_on_the_simulated_days(seeded: seed.SeedResult, db: Session) -> None:
    plan = seeded.plan
    first, last = db.execute(select(func.min(Alert.received_at), func.max(Alert.received_at))).one()
    assert plan.start <= first and last <= plan.end
    seg_first, seg_last = db.execute(
        select(func.min(ListeningSegment.started_at), func.max(ListeningSegment.ended_at))
    ).one()
    assert plan.start <= seg_first and seg_last <= plan.end
    # Every device listened for most of the days it was installed.
    listened = dict(
        db.execute(
            select(ListeningSegment.device_id, func.count()).group_by(ListeningSegment.device_id)
        ).all()
    )
    assert set(listened) == set(db.scalars(select(Device.id)))
    assert db.scalar(select(func.count(Alert.id))) == len(plan.detections)


def test_offline_nights_split_listening(seeded: seed.SeedResult, db: Session) -> None:
    outage = next(o for o in seeded.plan.outages if o.reason == "offline overnight")
    device_id = db.scalar(select(Device.id).where(Device.serial == outage.serial))
    covering = db.scalar(
        select(func.count())
        .select_from(ListeningSegment)
        .where(
            ListeningSegment.device_id == device_id,
            ListeningSegment.started_at < outage.ended_at,
            ListeningSegment.ended_at > outage.started_at,
        )
    )
    assert covering == 0


def test_the_erased_home_has_no_clip_files_or_personal_data(seeded: seed.SeedResult, db: Session) -> None:
    code = seeded.code("erased")
    home = db.scalar(select(Home).where(Home.code == code))
    assert home is not None and home.state == "withdrawn" and home.erased_at is not None
    assert db.scalar(select(func.count()).select_from(HomeContact).where(HomeContact.home_id == home.id)) == 0
    alerts = list(db.scalars(select(Alert).where(Alert.home_id == home.id)))
    planned = [d for d in seeded.plan.detections if d.home_key == "erased"]
    assert len(alerts) == len(planned) > 0  # the de-identified records stay
    store = ClipStore(seeded.settings.clip_dir)
    for a in alerts:
        assert a.clip.erased_at is not None and a.clip.erased_reason == "erasure"
        assert not store.exists(a.clip.storage_key)
    notes = db.scalars(select(HomeStateChange.note).where(HomeStateChange.home_id == home.id))
    assert all(n is None for n in notes)
    vnotes = db.scalars(select(Verdict.note).where(Verdict.alert_id.in_([a.id for a in alerts])))
    assert all(n is None for n in vnotes)
    # Every other home keeps its contact details and its clips.
    others = db.scalar(select(func.count()).select_from(HomeContact).where(HomeContact.home_id != home.id))
    assert others == len(seeded.plan.households) - 1
    kept = [c for c in db.scalars(select(Clip).where(Clip.erased_at.is_(None)))]
    assert kept and all(store.exists(c.storage_key) for c in kept)


def test_the_moved_device_alerts_land_on_each_home_in_turn(seeded: seed.SeedResult, db: Session) -> None:
    plan = seeded.plan
    assert plan.move_at is not None
    device_id = db.scalar(select(Device.id).where(Device.serial == plan.mover_serial))
    installs = list(
        db.scalars(
            select(Installation)
            .where(Installation.device_id == device_id)
            .order_by(Installation.installed_at)
        )
    )
    assert [i.home.code for i in installs] == [seeded.code("mover_from"), seeded.code("mover_to")]
    assert installs[0].removed_at == plan.move_at
    planned = {d.event_id: d for d in plan.detections if d.serial == plan.mover_serial}
    alerts = list(db.scalars(select(Alert).where(Alert.device_id == device_id)))
    assert len(alerts) == len(planned)
    by_home = Counter()
    for a in alerts:
        d = planned[a.event_id]
        expected = "mover_from" if d.at < plan.move_at else "mover_to"
        assert a.home_id == home_id(db, seeded.code(expected)), a.event_id
        by_home[expected] += 1
    assert by_home["mover_from"] > 0 and by_home["mover_to"] > 0


def test_the_skewed_clock_is_flagged_and_its_alerts_corrected(
    seeded: seed.SeedResult, app_client: TestClient, db: Session
) -> None:
    coordinator = seeded.sign_in("coordinator")
    sign_in(app_client, coordinator.email, coordinator.password)
    rows = {r["serial"]: r for r in app_client.get("/api/v1/devices").json()}
    skewed = rows[seeded.plan.skewed_serial]
    assert skewed["clock_skewed"] is True and skewed["clock_skew_s"] == pytest.approx(720.0, abs=1.0)
    assert [s for s, r in rows.items() if r["clock_skewed"]] == [seeded.plan.skewed_serial]
    # Its alerts carry the device's own time, and the known skew puts them back on the server's clock.
    planned = {d.event_id: d for d in seeded.plan.detections if d.serial == seeded.plan.skewed_serial}
    alerts = list(db.scalars(select(Alert).join(Device).where(Device.serial == seeded.plan.skewed_serial)))
    assert alerts
    for a in alerts:
        assert a.detected_at - planned[a.event_id].at == dt.timedelta(minutes=12)
        assert a.effective_at == planned[a.event_id].at


def test_every_demo_sign_in_works_and_lands_on_its_role_page(seeded: seed.SeedResult) -> None:
    expected = {"admin": "/devices", "coordinator": "/homes", "reviewer": "/review", "lead": "/summary"}
    for s in seeded.sign_ins:
        with TestClient(create_app(seeded.settings)) as c:
            sign_in(c, s.email, s.password)
            r = c.get("/", follow_redirects=False)
            assert r.status_code == 303 and r.headers["location"] == expected[s.role]


def test_staged_tests_are_logged_and_some_were_missed(seeded: seed.SeedResult, db: Session) -> None:
    staged = list(db.scalars(select(StagedEvent)))
    assert len(staged) == len(seeded.plan.staged) >= 2
    detected = {d.staged_key for d in seeded.plan.detections if d.staged_key}
    assert 0 < len(detected) < len(staged)


def test_three_reviewers_blind_second_reviews_one_adjudication_and_two_private_flags(
    seeded: seed.SeedResult, db: Session
) -> None:
    reviewers = {u.id: u for u in db.scalars(select(User).where(User.role == "reviewer"))}
    assert len(reviewers) == 3 and sum(u.is_adjudicator for u in reviewers.values()) == 1
    by_round = Counter(db.scalars(select(Verdict.round)))
    assert by_round[1] >= len(seeded.plan.detections) * 0.8
    assert by_round[2] >= 1 and by_round[3] == 1
    adjudicated = db.scalar(select(Alert).where(Alert.final_method == "adjudicated"))
    assert adjudicated is not None
    adjudicator = next(u for u in reviewers.values() if u.is_adjudicator)
    last = db.scalar(select(Verdict).where(Verdict.alert_id == adjudicated.id, Verdict.round == 3))
    assert last is not None and last.reviewer_id == adjudicator.id
    assert db.scalar(select(func.count(Alert.id)).where(Alert.private_flag.is_(True))) == 2
    first_reviewers = set(db.scalars(select(Verdict.reviewer_id).where(Verdict.round == 1)))
    assert first_reviewers <= set(reviewers) and len(first_reviewers) >= 2


def test_reviewed_verdicts_follow_the_story(seeded: seed.SeedResult, db: Session) -> None:
    cockatoo = home_id(db, seeded.code("cockatoo"))
    rows = db.execute(
        select(Alert.final_label, Alert.final_cause).where(
            Alert.home_id == cockatoo, Alert.sound_class == "baby_cry", Alert.final_label.is_not(None)
        )
    ).all()
    screeches = [r for r in rows if r.final_cause == "cat_other_pet"]
    assert len(screeches) >= 3 and all(r.final_label == "false_alarm" for r in screeches)


# --- the weekly summary over the seeded pilot -------------------------------------------------------


@pytest.fixture
def summary(seeded: seed.SeedResult, db: Session):  # type: ignore[no-untyped-def]
    from server.analytics import weekly

    now = seeded.plan.end + dt.timedelta(hours=1)
    return weekly.build_summary(db, trial_code=scenario.TRIAL_CODE, now=now)


def test_the_weekly_summary_shows_the_cockatoo_home_as_top_baby_cry_contributor(
    seeded: seed.SeedResult, summary
) -> None:  # type: ignore[no-untyped-def]
    assert summary.week.start_at == seeded.plan.end - dt.timedelta(days=7)  # the pilot's last week
    baby = next(c for c in summary.classes if c.sound_class == "baby_cry")
    top = baby.to_date.concentration
    assert top.top_home == seeded.code("cockatoo")
    assert top.top_home_share > 0.3
    table = baby.to_date.homes
    assert table.iloc[0]["home_code"] == seeded.code("cockatoo")
    assert table.iloc[0]["false_alarms"] > table.iloc[1]["false_alarms"]
    # The screeches are a pet's; the cause table says so.
    causes = baby.to_date.causes
    assert "cat_other_pet" in set(causes.iloc[:, 0])


def test_the_weekly_summary_flags_the_skewed_clock_and_no_silent_device(
    seeded: seed.SeedResult, summary
) -> None:  # type: ignore[no-untyped-def]
    ops = summary.operations
    assert [s for s, _ in ops.skewed_devices] == [seeded.plan.skewed_serial]
    assert ops.skewed_devices[0][1] == pytest.approx(720.0, abs=1.0)
    assert ops.silent_devices == ()


def test_the_erased_home_still_counts_in_the_figures(seeded: seed.SeedResult, db: Session, summary) -> None:  # type: ignore[no-untyped-def]
    code = seeded.code("erased")
    hid = home_id(db, code)
    for c in summary.classes:
        row = c.to_date.homes[c.to_date.homes["home_code"] == code]
        assert len(row) == 1
        expected = db.scalar(
            select(func.count(Alert.id)).where(
                Alert.home_id == hid, Alert.sound_class == c.sound_class, Alert.final_label == "false_alarm"
            )
        )
        assert int(row.iloc[0]["false_alarms"]) == expected
        assert float(row.iloc[0]["home_months"]) > 0
