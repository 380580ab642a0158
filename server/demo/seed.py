"""Seed the demo pilot into a fresh SQLite data directory, through the real front doors.

The register, installations and staged tests go through ``server.households.service``; every
heartbeat and alert clip is posted over HTTP by ``server.simulate.DeviceSimulator`` to the app
(``create_app`` behind an in-process HTTP client), with ``app.state.clock`` replaced by a replay
clock so that receipts and monitored time land on the simulated days; verdicts, adjudication,
gold checks, private-content flags and the erasure go through ``server.review.service`` and
``server.households.erasure``. The plan itself is ``server.demo.scenario``.
"""

from __future__ import annotations

import concurrent.futures as cf
import datetime as dt
import heapq
import json
import logging
import multiprocessing
import os
import secrets
import shutil
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server import migrate, sounds
from server.auth import service as auth_service
from server.auth.models import User
from server.db import make_engine, make_session_factory, session_scope
from server.demo import scenario
from server.demo.scenario import Detection, Household, Plan
from server.devices import service as devices_service
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, AlertState, Device
from server.errors import AppError
from server.households import catalogue, erasure
from server.households import service as households_service
from server.households.models import Home
from server.installations import service as installations_service
from server.quota import service as quota_service
from server.review import service as review_service
from server.review.queue import routing_key
from server.settings import Settings
from server.simulate import DeviceSimulator
from server.staged import service as staged_service
from server.trials import service as trials_service
from server.trials.models import Trial

log = logging.getLogger(__name__)

MARKER = "trialhouse-demo.json"
MARKER_KIND = "trialhouse-demo"

# The plan's trait keys onto the default attribute catalogue (server.households.catalogue).
TRAIT_ATTRIBUTES = {
    "infant": "infant_under_2",
    "children": "children_2_to_12",
    "dog": "dog",
    "cat": "cat",
    "other_pets": "other_pets",
    "aged_75": "resident_75_plus",
    "instrument": "instrument_played",
    "building_works": "building_works_nearby",
    "major_road": "major_road_50m",
    "flight_path": "under_flight_path",
}
DWELLING_ATTRIBUTE = "dwelling_type"
OCCUPANTS_ATTRIBUTE = "occupants"


class DemoError(AppError):
    """The demo cannot be seeded here (a data directory that is not a demo's, a failed request)."""

    code, status = "demo_refused", 409


@dataclass(frozen=True)
class SignIn:
    role: str
    email: str
    password: str
    name: str
    is_adjudicator: bool = False

    @property
    def label(self) -> str:
        return "reviewer (adjudicator)" if self.is_adjudicator else self.role


@dataclass
class SeedResult:
    settings: Settings
    plan: Plan
    sign_ins: tuple[SignIn, ...]
    home_codes: dict[str, str]  # household key -> home code
    alert_ids: dict[str, int]  # event_id -> alert id
    timings: dict[str, float] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def seconds(self) -> float:
        return self.timings.get("total", 0.0)

    def code(self, key: str) -> str:
        return self.home_codes[key]

    def sign_in(self, role: str, *, adjudicator: bool | None = None) -> SignIn:
        for s in self.sign_ins:
            if s.role == role and (adjudicator is None or s.is_adjudicator == adjudicator):
                return s
        raise KeyError(role)


# ---------------------------------------------------------------------------------------
# The data directory


def demo_settings(data_dir: Path) -> Settings:
    """Settings for a demo directory: its own SQLite file and secret, whatever the environment says."""
    return Settings(data_dir=Path(data_dir), database_url=None, secret_key=None)


def read_marker(data_dir: Path) -> dict[str, Any] | None:
    path = Path(data_dir) / MARKER
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("kind") == MARKER_KIND else None


def prepare_data_dir(data_dir: Path) -> None:
    """Make ``data_dir`` an empty demo directory; refuse one that holds anything but an earlier demo."""
    data_dir = Path(data_dir)
    if data_dir.exists() and not data_dir.is_dir():
        raise DemoError(f"{data_dir} exists and is not a directory; choose another --data-dir.")
    if data_dir.is_dir() and any(data_dir.iterdir()):
        if read_marker(data_dir) is None:
            raise DemoError(
                f"{data_dir} is not empty and is not a demo's data directory; the demo will not "
                "overwrite it. Choose another --data-dir (or an empty one)."
            )
        for child in data_dir.iterdir():
            if child.is_dir() and not child.is_symlink():
                shutil.rmtree(child)
            else:
                child.unlink()
    data_dir.mkdir(parents=True, exist_ok=True)
    _write_marker(data_dir, {"kind": MARKER_KIND, "complete": False})


def _write_marker(data_dir: Path, data: dict[str, Any]) -> None:
    path = Path(data_dir) / MARKER
    tmp = path.with_suffix(".tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)  # it holds the demo passwords
    with os.fdopen(fd, "w") as fh:
        json.dump(data, fh, indent=2, default=str)
    os.replace(tmp, path)


def sign_ins_from_marker(data: dict[str, Any]) -> tuple[SignIn, ...]:
    return tuple(SignIn(**s) for s in data.get("sign_ins", []))


# ---------------------------------------------------------------------------------------
# Clips, made in a second process while the first one posts


def _make_clip(job: tuple[str, int]) -> tuple[bytes, float]:
    kind, clip_seed = job
    rng = np.random.default_rng(clip_seed)
    clip, start_s = sounds.make_clip(kind, rng=rng)
    # The detector fires a moment after the sound begins.
    return clip, round(min(9.5, start_s + float(rng.uniform(0.15, 0.8))), 3)


class _ClipMaker:
    """Clips in plan order, synthesised by a forked worker a little ahead of the replay.

    The worker is forked before the app and its threads exist, and it only runs numpy; in a
    process that already has other threads (where fork is unsafe) the clips are made inline.
    """

    AHEAD = 48

    def __init__(self, detections: tuple[Detection, ...], workers: int) -> None:
        self.jobs = [(d.sound, d.clip_seed) for d in detections]
        self.pool: cf.ProcessPoolExecutor | None = None
        self.futures: dict[int, cf.Future[tuple[bytes, float]]] = {}
        self.submitted = 0
        if (
            workers > 0
            and len(self.jobs) >= 16
            and threading.active_count() == 1
            and "fork" in multiprocessing.get_all_start_methods()
        ):
            self.pool = cf.ProcessPoolExecutor(
                max_workers=workers, mp_context=multiprocessing.get_context("fork")
            )
            self._top_up(0)

    def _top_up(self, i: int) -> None:
        assert self.pool is not None
        while self.submitted < min(len(self.jobs), i + self.AHEAD):
            self.futures[self.submitted] = self.pool.submit(_make_clip, self.jobs[self.submitted])
            self.submitted += 1

    def get(self, i: int) -> tuple[bytes, float]:
        if self.pool is None:
            return _make_clip(self.jobs[i])
        self._top_up(i)
        return self.futures.pop(i).result()

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None


# ---------------------------------------------------------------------------------------
# Seeding


class ReplayClock:
    """The server's clock during seeding: whatever simulated instant the replay is at."""

    def __init__(self, at: dt.datetime) -> None:
        self.at = at

    def __call__(self) -> dt.datetime:
        return self.at


def seed_demo(
    data_dir: Path,
    *,
    seed: int = 1,
    homes: int = 36,
    weeks: int = 10,
    starts_on: dt.date | None = None,
    clip_workers: int = 1,
    progress: Callable[[str], None] | None = None,
) -> SeedResult:
    """Create the demo in ``data_dir`` (see ``prepare_data_dir``) and return what was made."""
    say = progress or (lambda _msg: None)
    t0, c0 = time.perf_counter(), time.process_time()
    plan = scenario.build_plan(seed=seed, homes=homes, weeks=weeks, starts_on=starts_on)
    prepare_data_dir(Path(data_dir))
    settings = demo_settings(Path(data_dir))
    engine = make_engine(settings.resolved_database_url())
    try:
        migrate.upgrade(engine)
        factory = make_session_factory(engine)
        timings: dict[str, float] = {"plan_and_schema": time.perf_counter() - t0}

        t = time.perf_counter()
        sign_ins = tuple(
            SignIn(m.role, m.email, f"{m.key}-{secrets.token_hex(4)}", m.name, m.is_adjudicator)
            for m in plan.staff
        )
        with session_scope(factory) as s:
            register = _seed_register(s, plan, sign_ins)
        timings["register"] = time.perf_counter() - t
        say(
            f"register: {len(plan.households)} homes, {len(plan.devices)} devices, "
            f"{len(plan.staged)} staged tests ({timings['register']:.1f} s)"
        )

        t = time.perf_counter()
        engine.dispose()  # no open SQLite handle goes across the clip worker's fork
        alert_ids, requests = _replay_devices(settings, plan, register.tokens, clip_workers)
        timings["device_traffic"] = time.perf_counter() - t
        say(
            f"devices: {requests} requests over HTTP, {len(alert_ids)} alerts "
            f"({timings['device_traffic']:.1f} s)"
        )

        t = time.perf_counter()
        with session_scope(factory) as s:
            counts = _seed_staff_work(s, settings, plan, register.home_codes, alert_ids, seed)
        timings["review_and_erasure"] = time.perf_counter() - t
        say(
            f"review: {counts['verdicts']} verdicts, {counts['adjudicated']} adjudicated, "
            f"{counts['pending']} still pending; erasure done ({timings['review_and_erasure']:.1f} s)"
        )
    finally:
        engine.dispose()
    timings["total"] = time.perf_counter() - t0
    timings["cpu"] = time.process_time() - c0
    counts["requests"] = requests
    result = SeedResult(settings, plan, sign_ins, register.home_codes, alert_ids, timings, counts)
    _write_marker(
        Path(data_dir),
        {
            "kind": MARKER_KIND,
            "complete": True,
            "seed": seed,
            "homes": homes,
            "weeks": weeks,
            "starts_on": plan.starts_on.isoformat(),
            "seeded_at": dt.datetime.now(dt.UTC).isoformat(),
            "seconds": round(timings["total"], 2),
            "timings": {k: round(v, 2) for k, v in timings.items()},
            "counts": counts,
            "sign_ins": [s.__dict__ for s in sign_ins],
        },
    )
    return result


# --- the register ----------------------------------------------------------------------------


@dataclass
class _Register:
    users: dict[str, User]
    home_codes: dict[str, str]
    tokens: dict[str, str]


def _attributes(session: Session, trial: Trial, hh: Household) -> dict[str, Any]:
    known = {d.key: d for d in catalogue.list_catalogue(session, trial)}
    values: dict[str, Any] = {}
    for trait, key in TRAIT_ATTRIBUTES.items():
        if key in known:
            values[key] = trait in hh.traits
    if DWELLING_ATTRIBUTE in known and hh.dwelling in (known[DWELLING_ATTRIBUTE].options or []):
        values[DWELLING_ATTRIBUTE] = hh.dwelling
    if OCCUPANTS_ATTRIBUTE in known:
        values[OCCUPANTS_ATTRIBUTE] = hh.occupants
    return values


def _seed_register(s: Session, plan: Plan, sign_ins: tuple[SignIn, ...]) -> _Register:
    users: dict[str, User] = {}
    for member, sign_in in zip(plan.staff, sign_ins, strict=True):
        users[member.key] = auth_service.create_user(
            s,
            email=member.email,
            name=member.name,
            role=member.role,
            password=sign_in.password,
            is_adjudicator=member.is_adjudicator,
            actor="demo",
        )
    admin, coordinator = users["admin"], users["coordinator"]
    trial = trials_service.create_trial(
        s,
        code=scenario.TRIAL_CODE,
        name=scenario.TRIAL_NAME,
        starts_on=plan.starts_on,
        ends_on=plan.ends_on,
        sound_classes=list(scenario.SOUND_CLASSES),
        fa_target_per_home_month=1.0,
        timezone=scenario.TIMEZONE,
        actor=admin,
    )
    households_service.seed_default_catalogue(s, trial)
    for line in plan.quota:
        key: str | None = None
        value: str | bool | None = None
        if line.trait is not None and line.trait.startswith("dwelling:"):
            key, value = DWELLING_ATTRIBUTE, line.trait.split(":", 1)[1]
        elif line.trait is not None:
            key, value = TRAIT_ATTRIBUTES[line.trait], True
        quota_service.add_target(
            s,
            trial,
            attribute_key=key,
            value=value,
            min_count=line.min_count,
            max_count=line.max_count,
            label=line.label,
            actor=coordinator,
        )

    tokens: dict[str, str] = {}
    devices: dict[str, Device] = {}
    for spec in plan.devices:
        device, token = devices_service.register_device(
            s,
            serial=spec.serial,
            trial=trial,
            hardware_model=spec.hardware_model,
            actor=coordinator,
            heartbeat_interval_s=scenario.HEARTBEAT_INTERVAL_S,
        )
        devices[spec.serial], tokens[spec.serial] = device, token

    homes: dict[str, Home] = {}
    today = plan.end.date() + dt.timedelta(days=1)
    for hh in plan.households:
        first = hh.steps[0]
        home = households_service.create_home(
            s, trial, attributes=_attributes(s, trial, hh), actor=coordinator, at=first.at, note=first.note
        )
        homes[hh.key] = home
        c = hh.contact
        households_service.set_contact(
            s,
            home,
            actor=coordinator,
            names=c.names,
            address=c.address,
            phone=c.phone,
            email=c.email,
            access_notes=c.access_notes,
        )
        for step in hh.steps[1:]:
            if step.state == "consented":
                assert hh.consent is not None
                households_service.record_consent(
                    s,
                    home,
                    form_version=hh.consent.form_version,
                    consented_on=hh.consent.consented_on,
                    staff_may_listen=hh.consent.staff_may_listen,
                    retention_days=hh.consent.retention_days,
                    actor=coordinator,
                    mark_consented=True,
                    at=step.at,
                    today=today,
                )
            elif step.state == "installed":
                for p in sorted(
                    (p for p in plan.placements if p.home_key == hh.key), key=lambda p: p.installed_at
                ):
                    households_service.install_device(
                        s,
                        home=home,
                        device=devices[p.serial],
                        room=p.room,
                        installed_at=p.installed_at,
                        actor=coordinator,
                    )
            else:
                households_service.transition(
                    s,
                    home,
                    step.state,
                    actor=coordinator,
                    at=step.at,
                    note=step.note,
                    listening=step.listening,
                )
                if step.state == "paused":
                    for p in plan.placements:
                        if p.home_key == hh.key and p.removed_at is not None and p.removed_at <= step.at:
                            inst = installations_service.current_installation(s, devices[p.serial])
                            if inst is not None and inst.home_id == home.id:
                                installations_service.remove_installation(
                                    s, inst, removed_at=p.removed_at, actor=coordinator
                                )
    for st in plan.staged:
        staged_service.log_staged_event(
            s,
            home=homes[st.home_key],
            sound_class=st.sound_class,
            started_at=st.started_at,
            ended_at=st.ended_at,
            source=st.source,
            level_db=st.level_db,
            actor=coordinator,
        )
    return _Register(users, {k: h.code for k, h in homes.items()}, tokens)


# --- the devices -----------------------------------------------------------------------------


def _replay_devices(
    settings: Settings, plan: Plan, tokens: dict[str, str], clip_workers: int
) -> tuple[dict[str, int], int]:
    """Every heartbeat and alert of the plan, in server-time order, over HTTP to the real app."""
    from fastapi.testclient import TestClient

    # Here, not at the top: the whole web app (every router, matplotlib) would load for every command.
    from server.app import create_app

    offsets = {d.serial: dt.timedelta(seconds=d.clock_offset_s) for d in plan.devices}
    events: list[tuple[dt.datetime, int, str, int]] = []
    for serial, beats in plan.beats.items():
        events += [(b.at, 0, serial, i) for i, b in enumerate(beats)]
    events += [
        (d.at + dt.timedelta(seconds=d.received_delay_s), 1, d.serial, i)
        for i, d in enumerate(plan.detections)
    ]
    events.sort()

    clips = _ClipMaker(plan.detections, clip_workers)
    clock = ReplayClock(plan.start)
    app = create_app(settings)
    app.state.clock = clock
    alert_ids: dict[str, int] = {}
    try:
        with TestClient(app, base_url="http://demo.invalid") as client:
            sims = {
                serial: DeviceSimulator(
                    "http://demo.invalid",
                    token,
                    client=client,  # type: ignore[arg-type]
                    retries=0,
                )
                for serial, token in tokens.items()
            }
            for at, kind, serial, i in events:
                clock.at = at
                sim = sims[serial]
                if kind == 0:
                    beat = plan.beats[serial][i]
                    r = sim.heartbeat(
                        listening=beat.listening, sent_at=at + offsets[serial], firmware=beat.firmware
                    )
                    if r.status != 200:
                        raise DemoError(f"heartbeat of {serial} at {at.isoformat()} got {r.status}: {r.body}")
                    continue
                clip, offset = clips.get(i)
                d = plan.detections[i]
                r = sim.send_alert(
                    clip=clip,
                    sound_class=d.sound_class,
                    score=d.score,
                    detected_at=d.at + offsets[serial],
                    clip_offset_s=offset,
                    event_id=d.event_id,
                    firmware=d.firmware,
                )
                if r.status != 201:
                    raise DemoError(f"alert {d.event_id} of {serial} got {r.status}: {r.body}")
                alert_ids[d.event_id] = int(r.body["alert_id"])
    finally:
        clips.close()
    return alert_ids, len(events)


# --- the staff's work ------------------------------------------------------------------------

_NOTES = {
    "cockatoo": "Parrot-like screech, not an infant.",
    "works": "Drilling or hammering next door.",
    "road": "Lorry passing outside.",
    "chat": "Household conversation; flagged as private.",
}
_WRONG_CAUSE = {
    "tv_radio_music": "speech",
    "dog": "cat_other_pet",
    "door_knock_impact": "kitchen_cooking",
    "appliance": "other_alarm_beep",
    "cat_other_pet": "other_child_sound",
}


@dataclass(order=True)
class _Task:
    at: dt.datetime
    seq: int
    kind: str = field(compare=False)
    alert_id: int = field(compare=False)
    detection: Detection | None = field(compare=False, default=None)


def _answer(d: Detection) -> tuple[str, str | None, str | None]:
    return d.truth_label, d.truth_cause, d.truth_resemblance


def _other_answer(d: Detection, rng: np.random.Generator) -> tuple[str, str | None, str | None]:
    """A reviewer's different reading of the same clip."""
    if d.truth_label == "confirmed":
        return "false_alarm", "unknown", "resembles"
    cause = d.truth_cause or "unknown"
    if rng.random() < 0.5 and cause in _WRONG_CAUSE:
        return "false_alarm", _WRONG_CAUSE[cause], d.truth_resemblance
    return ("false_alarm", cause, "unrelated" if d.truth_resemblance == "resembles" else "resembles")


def _seed_staff_work(
    s: Session,
    settings: Settings,
    plan: Plan,
    home_codes: dict[str, str],
    alert_ids: dict[str, int],
    seed: int,
) -> dict[str, int]:
    """Verdicts (first, blind second, one adjudication), gold checks and the erasure, in time order."""
    rng = np.random.default_rng([seed, 7])
    users = {u.email: u for u in s.scalars(select(User))}
    staff = {m.key: users[m.email] for m in plan.staff}
    first_pool = [staff["reviewer1"], staff["reviewer2"], staff["adjudicator"]]
    second_pool = [staff["reviewer1"], staff["reviewer2"]]
    adjudicator = staff["adjudicator"]
    coordinator = staff["coordinator"]
    # Seed-derived, so the same seed gives the same blind second reviews in every data directory.
    key = routing_key(f"demo-routing-{seed}")

    tasks: list[_Task] = []
    seq = 0

    def push(at: dt.datetime, kind: str, alert_id: int, d: Detection | None = None) -> None:
        nonlocal seq
        seq += 1
        heapq.heappush(tasks, _Task(at, seq, kind, alert_id, d))

    # The newest clips wait for the demo's reviewers: a queue of at least a few.
    backlog = max(4, round(0.04 * len(plan.detections)))
    by_receipt = sorted(plan.detections, key=lambda d: d.at + dt.timedelta(seconds=d.received_delay_s))
    for d in by_receipt[:-backlog] if len(by_receipt) > backlog else []:
        received = d.at + dt.timedelta(seconds=d.received_delay_s)
        at = received + dt.timedelta(hours=float(rng.uniform(0.5, 30.0)))
        if at < plan.end:
            push(at, "first", alert_ids[d.event_id], d)
    erased_key = plan.roles["erased"]
    erase_at = plan.household(erased_key).erase_at
    if erase_at is not None:
        push(erase_at, "erase", 0)
    gold_at = plan.end - dt.timedelta(hours=30)
    push(gold_at, "gold", 0)

    by_alert: dict[int, Detection] = {alert_ids[d.event_id]: d for d in plan.detections}
    first_of: dict[int, int] = {}
    counts = {
        "verdicts": 0,
        "second": 0,
        "disagreements": 0,
        "adjudicated": 0,
        "unsure": 0,
        "private": 0,
        "gold": 0,
    }
    unsure_left = 3
    erased_home_id: int | None = None
    while tasks:
        task = heapq.heappop(tasks)
        if task.kind == "erase":
            home = households_service.get_home(s, home_codes[erased_key])
            erased_home_id = home.id
            ticket = erasure.erasure_ticket(settings.resolved_secret_key(), home, now=task.at)
            erasure.erase_home(
                s,
                ClipStore(settings.clip_dir),
                home,
                secret=settings.resolved_secret_key(),
                ticket=ticket,
                confirm_code=home.code,
                actor=coordinator,
                now=task.at,
                cache_dir=settings.cache_dir,
                note="Asked by phone; confirmed in writing.",
            )
            continue
        if task.kind == "gold":
            counts["gold"] = _mark_gold(s, plan, alert_ids, coordinator)
            continue
        d = by_alert[task.alert_id]
        alert = s.get(Alert, task.alert_id)
        assert alert is not None
        if erased_home_id is not None and alert.home_id == erased_home_id:
            continue  # its clip is gone; the record stays as it was
        if task.kind == "first":
            label, cause, resemblance = _answer(d)
            if d.ambiguous and unsure_left > 0:
                # Not the adjudicator: the disagreement this starts is hers to settle.
                reviewer = second_pool[int(rng.integers(0, 2))]
                label, cause, resemblance = "unsure", None, None
                unsure_left -= 1
                counts["unsure"] += 1
            else:
                reviewer = first_pool[int(rng.choice(3, p=[0.45, 0.4, 0.15]))]
                if rng.random() < 0.02:
                    label, cause, resemblance = _other_answer(d, rng)
            note = _NOTES.get(d.source) if rng.random() < 0.3 or d.private else None
            review_service.record_verdict(
                s,
                reviewer=reviewer,
                alert_id=alert.id,
                label=label,
                cause=cause,
                resemblance=resemblance,
                note=note,
                private=d.private,
                key=key,
                now=task.at,
            )
            counts["verdicts"] += 1
            counts["private"] += int(d.private)
            first_of[alert.id] = reviewer.id
            if alert.state == AlertState.second_review:
                at = task.at + dt.timedelta(hours=float(rng.uniform(2.0, 48.0 if not d.ambiguous else 12.0)))
                if at < plan.end:
                    push(at, "second", alert.id)
        elif task.kind == "second":
            reviewer = next(
                r for r in second_pool[int(rng.integers(0, 2)) :] + second_pool if r.id != first_of[alert.id]
            )
            disagree = rng.random() < 0.2
            label, cause, resemblance = _other_answer(d, rng) if disagree else _answer(d)
            review_service.record_verdict(
                s,
                reviewer=reviewer,
                alert_id=alert.id,
                label=label,
                cause=cause,
                resemblance=resemblance,
                key=key,
                now=task.at,
            )
            counts["verdicts"] += 1
            counts["second"] += 1
            if alert.state == AlertState.adjudication:
                counts["disagreements"] += 1
                at = task.at + dt.timedelta(hours=float(rng.uniform(4.0, 30.0)))
                if counts["adjudicated"] == 0 and at < plan.end and first_of[alert.id] != adjudicator.id:
                    counts["adjudicated"] = 1  # one settled; the rest wait for the adjudicator
                    push(at, "adjudicate", alert.id)
        elif task.kind == "adjudicate":
            label, cause, resemblance = _answer(d)
            review_service.adjudicate(
                s,
                adjudicator=adjudicator,
                alert_id=alert.id,
                label=label,
                cause=cause,
                resemblance=resemblance,
                note="Listened twice; the spectrogram settles it.",
                now=task.at,
            )
    s.flush()
    states = dict(s.execute(select(Alert.state, func.count(Alert.id)).group_by(Alert.state)).all())
    counts["pending"] = int(states.get(AlertState.pending, 0))
    counts["awaiting_second"] = int(states.get(AlertState.second_review, 0))
    counts["awaiting_adjudication"] = int(states.get(AlertState.adjudication, 0))
    counts["final"] = int(states.get(AlertState.final, 0))
    return counts


def _mark_gold(s: Session, plan: Plan, alert_ids: dict[str, int], coordinator: User) -> int:
    """Two detected staged tests and one cockatoo screech become gold checks."""
    marked = 0
    staged = [d for d in plan.detections if d.staged_key is not None]
    screech = [d for d in plan.detections if d.source == "cockatoo"]
    for d, label, cause in [(d, "confirmed", None) for d in staged[:2]] + [
        (d, "false_alarm", "cat_other_pet") for d in screech[:1]
    ]:
        alert = s.get(Alert, alert_ids[d.event_id])
        if alert is None or alert.state != AlertState.final or alert.final_label != label:
            continue
        review_service.mark_gold(
            s, user=coordinator, alert_id=alert.id, expected_label=label, expected_cause=cause
        )
        marked += 1
    return marked
