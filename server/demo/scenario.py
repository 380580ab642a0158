"""The demo pilot as pure data: who lives where, which device listens in which room, what it hears.

``build_plan(seed=..., homes=..., weeks=..., starts_on=...)`` returns a frozen ``Plan``; the same
arguments give the same plan. Without ``starts_on`` the pilot ends at ``now`` (so the devices were
heard from a minute ago; the clock is read only if ``now`` is not given either) and began ``weeks``
weeks before, at midnight. Nothing here touches the database or the network: ``server.demo.seed``
plays the plan through the device API and the staff services.

The scenario is invented: the town of Fennick Vale, its households and everything they own.
Times are aware UTC; household life (evenings, school runs) is placed in the trial's time zone.
"""

from __future__ import annotations

import datetime as dt
import math
import zoneinfo
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

TOWN = "Fennick Vale"
TRIAL_CODE = "FENNICK-VALE"
TRIAL_NAME = "Fennick Vale listening pilot"
TIMEZONE = "Europe/Berlin"
SOUND_CLASSES = ("smoke_alarm", "baby_cry", "glass_break")
HARDWARE_MODELS = ("TH-100", "TH-200")
FIRMWARE_OLD, FIRMWARE_NEW = "2.3.1", "2.4.0"
# The score below which each firmware never sends an alert (the what-if can only raise it).
FIRMWARE_THRESHOLD = {FIRMWARE_OLD: 0.55, FIRMWARE_NEW: 0.60}
# Demo devices report every two days. Every heartbeat is a real request through the app (about
# 8 ms of CPU each), so a 30-minute interval would cost ten weeks x forty devices = 134,000
# requests; at two days it is about 1,400. Monitored time is the same: a beat within the gap
# tolerance (three intervals) extends the segment, and a device that stops listening (switched
# off, moved, offline for the night) says so with a last beat, listening: false.
HEARTBEAT_INTERVAL_S = 48 * 3600
CLOCK_SKEW_S = 12 * 60.0
MIN_HOMES, MAX_HOMES = 8, 400
MIN_WEEKS, MAX_WEEKS = 2, 52
EMAIL_DOMAIN = "example.test"  # reserved for testing (RFC 6761): nobody gets mail there

DWELLINGS = ("flat", "terraced house", "semi-detached house", "detached house")
# Trait keys of the plan; ``seed`` maps them onto the trial's attribute catalogue.
TRAITS = (
    "infant",
    "children",
    "dog",
    "cat",
    "other_pets",
    "aged_75",
    "instrument",
    "building_works",
    "major_road",
    "flight_path",
)


# ---------------------------------------------------------------------------------------
# The plan's records


@dataclass(frozen=True)
class StaffMember:
    key: str
    email: str
    name: str
    role: str
    is_adjudicator: bool = False


@dataclass(frozen=True)
class StateStep:
    at: dt.datetime
    state: str
    note: str | None = None
    listening: bool = True


@dataclass(frozen=True)
class Contact:
    names: str
    address: str
    phone: str
    email: str
    access_notes: str


@dataclass(frozen=True)
class ConsentTerms:
    form_version: str
    consented_on: dt.date
    staff_may_listen: bool
    retention_days: int


@dataclass(frozen=True)
class Household:
    key: str
    character: str  # one line for the register (no personal data)
    traits: frozenset[str]
    dwelling: str  # one of DWELLINGS
    occupants: int
    steps: tuple[StateStep, ...]
    consent: ConsentTerms | None
    contact: Contact
    erase_at: dt.datetime | None = None

    @property
    def final_state(self) -> str:
        return self.steps[-1].state


@dataclass(frozen=True)
class DeviceSpec:
    serial: str
    hardware_model: str
    clock_offset_s: float  # device clock minus true time
    upgrade_at: dt.datetime | None


@dataclass(frozen=True)
class Placement:
    serial: str
    home_key: str
    room: str
    installed_at: dt.datetime
    removed_at: dt.datetime | None


@dataclass(frozen=True)
class Beat:
    at: dt.datetime  # true (server) time; the device stamps sent_at with its own clock
    listening: bool
    firmware: str


@dataclass(frozen=True)
class Outage:
    serial: str
    started_at: dt.datetime
    ended_at: dt.datetime
    reason: str


@dataclass(frozen=True)
class Detection:
    """One alert a device sends: what it claims, what it really heard, and the reviewers' truth."""

    event_id: str
    serial: str
    home_key: str
    sound_class: str  # claimed by the detector
    sound: str  # kind in server.sounds.SOUNDS that the clip is made of
    score: float
    at: dt.datetime  # true detection time
    received_delay_s: float
    firmware: str
    truth_label: str  # confirmed | false_alarm
    truth_cause: str | None
    truth_resemblance: str | None
    source: str  # key of the source in SOURCES, or "staged"
    clip_seed: int
    staged_key: str | None = None
    private: bool = False
    ambiguous: bool = False  # a reviewer may well say "unsure" the first time


@dataclass(frozen=True)
class StagedTest:
    key: str
    home_key: str
    sound_class: str
    started_at: dt.datetime
    ended_at: dt.datetime
    source: str
    level_db: float
    detected: bool


@dataclass(frozen=True)
class QuotaLine:
    label: str
    trait: str | None  # None: all homes; "dwelling:flat" for a one-of value
    min_count: int | None
    max_count: int | None


@dataclass(frozen=True)
class Plan:
    seed: int
    homes: int
    weeks: int
    starts_on: dt.date
    start: dt.datetime
    end: dt.datetime
    staff: tuple[StaffMember, ...]
    households: tuple[Household, ...]
    devices: tuple[DeviceSpec, ...]
    placements: tuple[Placement, ...]
    outages: tuple[Outage, ...]
    beats: dict[str, tuple[Beat, ...]]
    detections: tuple[Detection, ...]
    staged: tuple[StagedTest, ...]
    quota: tuple[QuotaLine, ...]
    roles: dict[str, str] = field(default_factory=dict)  # story role -> household key
    mover_serial: str = ""
    move_at: dt.datetime | None = None
    skewed_serial: str = ""
    works: tuple[dt.datetime, dt.datetime] | None = None

    @property
    def ends_on(self) -> dt.date:
        """The pilot's last day (local): the day of ``end``, or the day before when it ends at midnight."""
        last = (self.end - dt.timedelta(seconds=1)).astimezone(_zone())
        return last.date()

    def household(self, key: str) -> Household:
        return next(h for h in self.households if h.key == key)

    @property
    def request_count(self) -> int:
        return sum(len(b) for b in self.beats.values()) + len(self.detections)


# ---------------------------------------------------------------------------------------
# What the devices hear


@dataclass(frozen=True)
class Source:
    """A sound in a home that makes the detector fire, at a rate per listening day."""

    key: str
    sound: str
    sound_class: str
    label: str
    cause: str | None
    resemblance: str | None
    rate_per_day: float
    hours: tuple[tuple[float, float], ...]  # local hours when it happens
    weekdays_only: bool = False
    new_firmware_factor: float = 1.0  # the new firmware's effect on the rate
    th100_factor: float = 1.0  # the older hardware's effect on the rate
    kitchen_factor: float = 1.0
    score: tuple[float, float] = (2.0, 3.0)  # beta shape, mapped above the threshold


EVENING = ((17.0, 23.0),)
DAYTIME = ((8.0, 20.0),)
WAKING = ((7.0, 22.5),)

SOURCES: dict[str, Source] = {
    s.key: s
    for s in (
        # Everyone's home
        Source(
            "tv",
            "tv_babble",
            "baby_cry",
            "false_alarm",
            "tv_radio_music",
            "resembles",
            0.012,
            EVENING,
            new_firmware_factor=0.6,
        ),
        Source(
            "vacuum", "vacuum", "smoke_alarm", "false_alarm", "appliance", "resembles", 0.008, ((9.0, 18.0),)
        ),
        Source(
            "door",
            "door_slam",
            "glass_break",
            "false_alarm",
            "door_knock_impact",
            "resembles",
            0.014,
            WAKING,
            th100_factor=3.0,
        ),
        Source(
            "kettle",
            "kettle_rumble",
            "smoke_alarm",
            "false_alarm",
            "kitchen_cooking",
            "unrelated",
            0.004,
            ((6.5, 9.0), (17.0, 19.5)),
            kitchen_factor=3.0,
            score=(1.5, 4.0),
        ),
        # Homes with character
        Source(
            "dog",
            "dog_bark",
            "baby_cry",
            "false_alarm",
            "dog",
            "unrelated",
            0.03,
            WAKING,
            new_firmware_factor=0.6,
            score=(1.5, 4.0),
        ),
        Source(
            "dog_glass",
            "dog_bark",
            "glass_break",
            "false_alarm",
            "dog",
            "unrelated",
            0.008,
            WAKING,
            score=(1.5, 4.0),
        ),
        Source(
            "cockatoo",
            "bird_screech",
            "baby_cry",
            "false_alarm",
            "cat_other_pet",
            "resembles",
            0.4,
            ((6.0, 9.5), (16.0, 20.0)),
            new_firmware_factor=0.6,
            score=(3.0, 2.0),
        ),
        Source(
            "road",
            "traffic",
            "glass_break",
            "false_alarm",
            "traffic_aircraft",
            "unrelated",
            0.09,
            ((7.0, 9.5), (16.0, 19.0)),
            score=(1.5, 4.0),
        ),
        Source(
            "piano",
            "piano",
            "smoke_alarm",
            "false_alarm",
            "tv_radio_music",
            "resembles",
            0.07,
            ((15.0, 21.0),),
        ),
        Source(
            "works",
            "drill",
            "glass_break",
            "false_alarm",
            "tools_building",
            "unrelated",
            0.45,
            ((8.0, 17.0),),
            weekdays_only=True,
        ),
        Source(
            "works_smoke",
            "drill",
            "smoke_alarm",
            "false_alarm",
            "tools_building",
            "unrelated",
            0.15,
            ((8.0, 17.0),),
            weekdays_only=True,
            score=(1.5, 4.0),
        ),
        # Real events
        Source(
            "cry", "baby_cry", "baby_cry", "confirmed", None, None, 0.12, ((0.0, 24.0),), score=(5.0, 1.5)
        ),
        Source(
            "toast",
            "smoke_alarm_t3",
            "smoke_alarm",
            "confirmed",
            None,
            None,
            0.0,
            ((7.0, 9.0), (18.0, 20.0)),
            score=(6.0, 1.2),
        ),
        Source(
            "dropped_glass",
            "glass_break",
            "glass_break",
            "confirmed",
            None,
            None,
            0.0,
            WAKING,
            score=(5.0, 1.5),
        ),
        # A household conversation that the reviewer flags as private content
        Source(
            "chat",
            "tv_babble",
            "baby_cry",
            "false_alarm",
            "speech",
            "unrelated",
            0.0,
            EVENING,
            score=(1.5, 4.0),
        ),
    )
}

STAGED_SOURCES = {
    "smoke_alarm": (
        "test alarm sounder held up in the hallway, 3 m from the device",
        85.0,
        (30.0, 60.0),
        (2.0, 8.0),
        0.9,
    ),
    "baby_cry": (
        "recorded infant cry played from a small speaker at 1.5 m",
        70.0,
        (45.0, 90.0),
        (3.0, 15.0),
        0.8,
    ),
    "glass_break": (
        "pane of old window glass broken inside a heavy bag, 4 m from the device",
        90.0,
        (2.0, 5.0),
        (0.3, 1.5),
        0.75,
    ),
}


# ---------------------------------------------------------------------------------------
# People, invented


GIVEN = (
    "Aurel",
    "Brisa",
    "Caio",
    "Dessa",
    "Emeric",
    "Fable",
    "Gwenna",
    "Halden",
    "Isolde",
    "Jory",
    "Kenna",
    "Lisandro",
    "Maelis",
    "Nico",
    "Ottilie",
    "Perrin",
    "Quinta",
    "Roswin",
    "Sela",
    "Teodor",
    "Una",
    "Vasco",
    "Wilma",
    "Yusra",
    "Zeno",
    "Anouk",
    "Bram",
    "Cosima",
    "Dario",
    "Elske",
)
FAMILY_HEAD = (
    "Tar",
    "Mir",
    "Quen",
    "Vol",
    "Bri",
    "Dax",
    "Ost",
    "Yel",
    "Fen",
    "Lor",
    "Gav",
    "Hul",
    "Nor",
    "Pell",
    "Rask",
    "Sund",
)
FAMILY_TAIL = (
    "velow",
    "renhald",
    "dasby",
    "moric",
    "tanish",
    "quill",
    "berow",
    "snade",
    "vantree",
    "kessop",
    "marle",
    "wyth",
)
STREETS = (
    "Lanternwell Row",
    "Copperbeck Lane",
    "Orrery Street",
    "Hazelfold Way",
    "Mistlegate Road",
    "Tumblecross Close",
    "Wrenhollow Court",
    "Saltbriar Terrace",
    "Quarrystep Lane",
    "Bellwether Yard",
)

STAFF = (
    StaffMember("admin", f"admin@{EMAIL_DOMAIN}", "Maren Tollerby", "admin"),
    StaffMember("coordinator", f"coordinator@{EMAIL_DOMAIN}", "Juno Aberwyth", "coordinator"),
    StaffMember("reviewer1", f"reviewer.one@{EMAIL_DOMAIN}", "Kit Ravensmoric", "reviewer"),
    StaffMember("reviewer2", f"reviewer.two@{EMAIL_DOMAIN}", "Sable Quendasby", "reviewer"),
    StaffMember(
        "adjudicator", f"adjudicator@{EMAIL_DOMAIN}", "Ottilie Fenwyth", "reviewer", is_adjudicator=True
    ),
    StaffMember("lead", f"lead@{EMAIL_DOMAIN}", "Dorian Paskmarle", "lead"),
)

# Story roles, in the order they are handed out; every plan has all of them.
ROLES = ("cockatoo", "erased", "mover_from", "mover_to", "building", "road", "piano", "dog")

CHARACTER = {
    "cockatoo": "Pet cockatoo in the living room; screeches at dawn and dusk",
    "erased": "Young family; left the pilot and asked for erasure",
    "mover_from": "Away for the second half of the pilot; its device moved on",
    "mover_to": "Joined mid-pilot with the device from another home",
    "building": "Extension being built next door for two weeks",
    "road": "Front room on the ring road",
    "piano": "Piano played most afternoons",
    "dog": "Two lively terriers",
}


# ---------------------------------------------------------------------------------------
# Helpers


def _zone() -> zoneinfo.ZoneInfo:
    return zoneinfo.ZoneInfo(TIMEZONE)


def local_time(day: dt.date, hour: float) -> dt.datetime:
    """``hour`` (fractional) on ``day`` in the trial's zone, as aware UTC."""
    base = dt.datetime.combine(day, dt.time(0, 0), tzinfo=_zone())
    return (base + dt.timedelta(hours=hour)).astimezone(dt.UTC)


def _round_s(t: dt.datetime) -> dt.datetime:
    return t.replace(microsecond=0)


def _hours_pick(rng: np.random.Generator, hours: Sequence[tuple[float, float]]) -> float:
    lengths = np.array([b - a for a, b in hours])
    i = int(rng.choice(len(hours), p=lengths / lengths.sum()))
    a, b = hours[i]
    return float(rng.uniform(a, b))


def _score(rng: np.random.Generator, firmware: str, shape: tuple[float, float]) -> float:
    low = FIRMWARE_THRESHOLD[firmware]
    return round(low + (0.995 - low) * float(rng.beta(*shape)), 4)


@dataclass
class _Builder:
    rng: np.random.Generator
    start: dt.datetime
    end: dt.datetime
    households: list[Household] = field(default_factory=list)
    devices: list[DeviceSpec] = field(default_factory=list)
    placements: list[Placement] = field(default_factory=list)
    outages: list[Outage] = field(default_factory=list)
    detections: list[Detection] = field(default_factory=list)
    staged: list[StagedTest] = field(default_factory=list)
    used_names: set[str] = field(default_factory=set)
    event_seq: int = 0

    def at(self, days: float) -> dt.datetime:
        return _round_s(self.start + dt.timedelta(days=days))

    def family(self) -> str:
        for _ in range(200):
            name = str(self.rng.choice(FAMILY_HEAD)) + str(self.rng.choice(FAMILY_TAIL))
            if name not in self.used_names:
                self.used_names.add(name)
                return name
        return f"{self.rng.choice(FAMILY_HEAD)}{len(self.used_names)}"

    def contact(self, notes: str, adults: int) -> Contact:
        fam = self.family()
        given = [str(g) for g in self.rng.choice(GIVEN, size=max(1, min(adults, 2)), replace=False)]
        names = " and ".join(given) + f" {fam}"
        street = str(self.rng.choice(STREETS))
        number = int(self.rng.integers(1, 140))
        return Contact(
            names=names,
            address=f"{number} {street}, {TOWN}",
            phone=f"0100 555 {int(self.rng.integers(0, 10000)):04d}",
            email=f"{given[0].lower()}.{fam.lower()}@{EMAIL_DOMAIN}",
            access_notes=notes,
        )

    def event_id(self) -> str:
        self.event_seq += 1
        return f"ev-{int(self.rng.integers(0, 2**40)):010x}-{self.event_seq:05d}"


# ---------------------------------------------------------------------------------------
# The plan


def build_plan(
    *,
    seed: int = 1,
    homes: int = 36,
    weeks: int = 10,
    starts_on: dt.date | None = None,
    now: dt.datetime | None = None,
) -> Plan:
    """The whole demo pilot for ``homes`` installed homes over ``weeks`` weeks, from ``seed``."""
    if not MIN_HOMES <= homes <= MAX_HOMES:
        raise ValueError(f"The demo needs between {MIN_HOMES} and {MAX_HOMES} homes; got {homes}.")
    if not MIN_WEEKS <= weeks <= MAX_WEEKS:
        raise ValueError(f"The demo runs between {MIN_WEEKS} and {MAX_WEEKS} weeks; got {weeks}.")
    if starts_on is None:
        # Ends now: weeks x 7 days back to midnight, plus today so far.
        end = (now or dt.datetime.now(dt.UTC)).astimezone(dt.UTC).replace(second=0, microsecond=0)
        starts_on = end.astimezone(_zone()).date() - dt.timedelta(days=7 * weeks)
    else:
        end = local_time(starts_on + dt.timedelta(days=7 * weeks), 0.0)
    rng = np.random.default_rng(seed)
    start = local_time(starts_on, 0.0)
    days = (end - start).total_seconds() / 86400.0
    b = _Builder(rng=rng, start=start, end=end)

    move_at = local_time((start + dt.timedelta(days=0.45 * days)).date(), 11.0)
    withdraw_at = local_time((start + dt.timedelta(days=0.6 * days)).date(), 15.5)
    works_from = local_time((start + dt.timedelta(days=0.3 * days)).date(), 0.0)
    works = (works_from, min(end, works_from + dt.timedelta(days=14)))
    rollout = (
        local_time((start + dt.timedelta(days=0.5 * days)).date(), 3.0),
        local_time((start + dt.timedelta(days=0.5 * days + 3)).date(), 3.0),
    )

    keys, traits = _assign_traits(rng, homes)
    roles = {role: role for role in ROLES}
    ramp = min(10.0, max(1.0, days / 7.0))

    serial_n = 0

    def new_device(model: str | None = None) -> DeviceSpec:
        nonlocal serial_n
        serial_n += 1
        # Alternate the models so that both are in every home mix; the draw keeps the spread uneven.
        model = model or HARDWARE_MODELS[(serial_n + int(rng.random() < 0.3)) % 2]
        wave = rollout[int(rng.integers(0, 2))]
        spec = DeviceSpec(
            serial=f"{model.replace('-', '')}-{serial_n:04d}",
            hardware_model=model,
            clock_offset_s=0.0,
            upgrade_at=wave,
        )
        b.devices.append(spec)
        return spec

    mover_serial = ""
    skewed_serial = ""
    for i, key in enumerate(keys):
        tr = traits[key]
        dwelling, occupants = _dwelling(rng, tr)
        install_day = float(rng.uniform(0.0, ramp)) if key != "mover_to" else None
        if key == "mover_to":
            installed_at = move_at + dt.timedelta(days=1)
            recruited = start + dt.timedelta(days=0.1 * days)
        else:
            assert install_day is not None
            installed_at = local_time(
                (start + dt.timedelta(days=install_day)).date(), float(rng.uniform(9.5, 16.0))
            )
            if installed_at < start:
                installed_at = start + dt.timedelta(hours=10)
            recruited = start - dt.timedelta(days=float(rng.uniform(21.0, 28.0)))
        installed_at = _round_s(installed_at)
        steps = _steps_for(rng, key, recruited, installed_at, move_at, withdraw_at)
        consent_step = next(s for s in steps if s.state == "consented")
        notes = _access_notes(key, tr)
        hh = Household(
            key=key,
            character=CHARACTER.get(key, _general_character(tr, dwelling)),
            traits=tr,
            dwelling=dwelling,
            occupants=occupants,
            steps=steps,
            consent=ConsentTerms(
                "C-2.1", consent_step.at.astimezone(_zone()).date(), True, 60 if i % 7 == 3 else 120
            ),
            contact=b.contact(notes, 1 if "aged_75" in tr else 2),
            erase_at=withdraw_at + dt.timedelta(days=1) if key == "erased" else None,
        )
        b.households.append(hh)

        # Devices: one per home, a second one in every sixth ordinary home.
        if key == "mover_to":
            continue  # gets the mover's device
        room = _room(rng, tr)
        dev = new_device("TH-200" if key == "cockatoo" else None)
        removed = move_at if key == "mover_from" else withdraw_at if key == "erased" else None
        b.placements.append(Placement(dev.serial, key, room, installed_at, removed))
        if key == "mover_from":
            mover_serial = dev.serial
            b.placements.append(
                Placement(
                    dev.serial, "mover_to", "living_room", _round_s(move_at + dt.timedelta(days=1)), None
                )
            )
        if key == "piano":
            skewed_serial = dev.serial
        if key.startswith("home-") and i % 6 == 5:
            other = "kitchen" if room != "kitchen" else "landing"
            second = new_device()
            b.placements.append(
                Placement(second.serial, key, other, installed_at + dt.timedelta(minutes=12), None)
            )

    # The skewed clock.
    b.devices = [
        DeviceSpec(d.serial, d.hardware_model, CLOCK_SKEW_S, d.upgrade_at) if d.serial == skewed_serial else d
        for d in b.devices
    ]

    _plan_outages(b, rng, days)
    listening = _listening(b)
    _plan_sources(b, listening, works, days)
    _plan_one_offs(b, listening)
    _ensure_heard(b, listening, ("mover_from", "mover_to", "erased"))
    _ensure_cockatoo_leads(b, listening)
    _plan_staged(b, listening, homes)
    b.detections.sort(key=lambda d: (d.at, d.serial))
    _ensure_ambiguous(b)
    beats = {d.serial: _beats_for(b, d) for d in b.devices}
    _assign_extras(b, homes)

    return Plan(
        seed=seed,
        homes=homes,
        weeks=weeks,
        starts_on=starts_on,
        start=start,
        end=end,
        staff=STAFF,
        households=tuple(b.households),
        devices=tuple(b.devices),
        placements=tuple(b.placements),
        outages=tuple(b.outages),
        beats=beats,
        detections=tuple(b.detections),
        staged=tuple(b.staged),
        quota=_quota(homes),
        roles=roles,
        mover_serial=mover_serial,
        move_at=_round_s(move_at),
        skewed_serial=skewed_serial,
        works=works,
    )


def _assign_traits(rng: np.random.Generator, homes: int) -> tuple[list[str], dict[str, frozenset[str]]]:
    keys = list(ROLES) + [f"home-{i:02d}" for i in range(1, homes - len(ROLES) + 1)]
    traits: dict[str, set[str]] = {k: set() for k in keys}
    traits["cockatoo"].add("other_pets")
    traits["building"].add("building_works")
    traits["road"].add("major_road")
    traits["piano"].add("instrument")
    traits["dog"].add("dog")
    traits["erased"].update({"infant", "children"})
    traits["mover_to"].add("infant")
    general = keys[len(ROLES) :]
    order = [str(k) for k in rng.permutation(general)]

    def take(n: int, trait: str) -> None:
        have = sum(trait in t for t in traits.values())
        pool = [k for k in order if trait not in traits[k]]
        for k in pool[: max(0, n - have)]:
            traits[k].add(trait)
        order.sort(key=lambda k: len(traits[k]))  # spread traits over homes

    take(round(homes * 0.22), "infant")
    take(round(homes * 0.14), "dog")
    take(round(homes * 0.08), "aged_75")
    take(round(homes * 0.06), "major_road")
    take(round(homes * 0.06), "instrument")
    take(round(homes * 0.06), "flight_path")
    take(round(homes * 0.2), "children")
    take(round(homes * 0.1), "cat")
    for k in traits:
        if "infant" in traits[k] and "aged_75" in traits[k]:
            traits[k].discard("aged_75")
    return keys, {k: frozenset(v) for k, v in traits.items()}


def _dwelling(rng: np.random.Generator, tr: frozenset[str]) -> tuple[str, int]:
    """A dwelling type from the default catalogue's options, and the number of occupants."""
    if "aged_75" in tr:
        return ("flat" if rng.random() < 0.5 else "semi-detached house"), int(rng.integers(1, 3))
    dwelling = str(rng.choice(DWELLINGS, p=[0.35, 0.25, 0.25, 0.15]))
    base = 2 + ("infant" in tr) + ("children" in tr) * int(rng.integers(1, 3))
    return dwelling, min(6, base + int(rng.integers(0, 2)))


def _room(rng: np.random.Generator, tr: frozenset[str]) -> str:
    if "infant" in tr and rng.random() < 0.6:
        return "nursery"
    return str(rng.choice(["living_room", "living_room", "kitchen", "hallway", "landing", "bedroom"]))


def _general_character(tr: frozenset[str], dwelling: str) -> str:
    bits = {
        "infant": "a baby",
        "children": "school-age children",
        "dog": "a dog",
        "cat": "a cat",
        "aged_75": "a resident over 75",
        "instrument": "a guitar player",
        "major_road": "a busy road outside",
        "flight_path": "planes overhead",
    }
    have = [v for k, v in bits.items() if k in tr]
    return f"{dwelling.capitalize()}" + (" with " + ", ".join(have) if have else ", quiet household")


def _access_notes(key: str, tr: frozenset[str]) -> str:
    notes = {
        "cockatoo": "The cockatoo flies free in the living room: close doors behind you.",
        "dog": "Two terriers; they bark at the bell but are friendly.",
        "building": "Scaffolding next door; use the side gate.",
        "road": "Park on the side street, not on the ring road.",
        "piano": "Visits after 4 pm clash with piano practice.",
    }
    if key in notes:
        return notes[key]
    if "dog" in tr:
        return "Dog in the house; ring first."
    if "aged_75" in tr:
        return "Call ahead; allow time to answer the door."
    return ""


def _steps_for(
    rng: np.random.Generator,
    key: str,
    recruited: dt.datetime,
    installed_at: dt.datetime,
    move_at: dt.datetime,
    withdraw_at: dt.datetime,
) -> tuple[StateStep, ...]:
    if key == "mover_to":
        screened = recruited + dt.timedelta(days=1)
        consented = max(
            screened + dt.timedelta(hours=12), move_at - dt.timedelta(days=float(rng.uniform(1.5, 3.0)))
        )
    else:
        screened = recruited + dt.timedelta(days=float(rng.uniform(4.0, 8.0)))
        consented = installed_at - dt.timedelta(days=float(rng.uniform(3.0, 9.0)))
        consented = max(consented, screened + dt.timedelta(days=1))
    steps = [
        StateStep(_round_s(recruited), "candidate", "Answered the pilot's letter"),
        StateStep(_round_s(screened), "screened", "Phone screening done"),
        StateStep(_round_s(consented), "consented", "Consent form C-2.1 signed"),
        StateStep(installed_at, "installed", None),
        StateStep(_round_s(installed_at + dt.timedelta(hours=20)), "active", "First day of listening"),
    ]
    if key == "mover_from":
        steps.append(
            StateStep(
                move_at, "paused", "Household away until after the pilot; device moved", listening=False
            )
        )
    if key == "erased":
        steps.append(StateStep(withdraw_at, "withdrawn", "Household asked to leave and to be erased"))
    return tuple(steps)


def _plan_outages(b: _Builder, rng: np.random.Generator, days: float) -> None:
    """A few nights offline for some devices, and one weekend with the router unplugged."""
    fixed = [p for p in b.placements if p.removed_at is None]
    if not fixed:
        return
    count = max(2, round(len(fixed) * 0.12))
    picks = rng.choice(len(fixed), size=min(count, len(fixed)), replace=False)
    for n, idx in enumerate(picks):
        p = fixed[int(idx)]
        nights = 1 + int(rng.integers(0, 3))
        for _ in range(nights):
            for _attempt in range(10):
                after = dt.timedelta(days=float(rng.uniform(1.0, max(1.5, days - 2.0))))
                day = (p.installed_at + after).date()
                s = local_time(day, float(rng.uniform(22.5, 23.8)))
                e = local_time(day + dt.timedelta(days=1), float(rng.uniform(5.5, 7.5)))
                if s > p.installed_at + dt.timedelta(hours=6) and e < b.end - dt.timedelta(hours=1):
                    b.outages.append(Outage(p.serial, _round_s(s), _round_s(e), "offline overnight"))
                    break
        if n == 0 and days >= 12:
            day = (b.start + dt.timedelta(days=days * 0.7)).date()
            day -= dt.timedelta(days=(day.weekday() - 4) % 7)  # a Friday
            s, e = local_time(day, 18.0), local_time(day + dt.timedelta(days=3), 8.0)
            if s > p.installed_at and e < b.end:
                b.outages.append(
                    Outage(p.serial, _round_s(s), _round_s(e), "router unplugged for the weekend")
                )
    # Overlapping outages of one device merge into one.
    merged: list[Outage] = []
    for o in sorted(b.outages, key=lambda o: (o.serial, o.started_at)):
        if merged and merged[-1].serial == o.serial and o.started_at <= merged[-1].ended_at:
            last = merged.pop()
            o = Outage(o.serial, last.started_at, max(last.ended_at, o.ended_at), last.reason)
        merged.append(o)
    b.outages = merged


@dataclass(frozen=True)
class _Window:
    serial: str
    home_key: str
    room: str
    start: dt.datetime
    end: dt.datetime


def _listening(b: _Builder) -> list[_Window]:
    """Stretches in which a device listens in a home: its placements minus its outages."""
    out = []
    for p in b.placements:
        a = p.installed_at + dt.timedelta(minutes=5)
        z = p.removed_at or b.end
        cuts = sorted((o.started_at, o.ended_at) for o in b.outages if o.serial == p.serial)
        for s, e in cuts:
            if e <= a or s >= z:
                continue
            if s > a:
                out.append(_Window(p.serial, p.home_key, p.room, a, s))
            a = max(a, e)
        if z > a:
            out.append(_Window(p.serial, p.home_key, p.room, a, z))
    return out


def _windows_of(listening: list[_Window], home_key: str) -> list[_Window]:
    return [w for w in listening if w.home_key == home_key]


def _firmware_at(b: _Builder, serial: str, at: dt.datetime) -> str:
    spec = next(d for d in b.devices if d.serial == serial)
    return FIRMWARE_NEW if spec.upgrade_at is not None and at >= spec.upgrade_at else FIRMWARE_OLD


def _place_event(
    b: _Builder,
    windows: list[_Window],
    hours: Sequence[tuple[float, float]],
    *,
    weekdays_only: bool = False,
    within: tuple[dt.datetime, dt.datetime] | None = None,
    tries: int = 30,
) -> tuple[dt.datetime, _Window] | None:
    rng = b.rng
    if not windows:
        return None
    lo = min(w.start for w in windows)
    hi = max(w.end for w in windows)
    if within is not None:
        lo, hi = max(lo, within[0]), min(hi, within[1])
    if hi <= lo:
        return None
    zone = _zone()
    first, last = lo.astimezone(zone).date(), hi.astimezone(zone).date()
    span = (last - first).days + 1
    for _ in range(tries):
        day = first + dt.timedelta(days=int(rng.integers(0, span)))
        if weekdays_only and day.weekday() >= 5:
            continue
        t = _round_s(local_time(day, _hours_pick(rng, hours)))
        if not lo <= t < hi:
            continue
        live = [w for w in windows if w.start <= t < w.end - dt.timedelta(minutes=2)]
        if live:
            return t, live[int(rng.integers(0, len(live)))]
    return None


def _add_detection(
    b: _Builder,
    src: Source,
    t: dt.datetime,
    w: _Window,
    *,
    staged_key: str | None = None,
    private: bool = False,
) -> None:
    fw = _firmware_at(b, w.serial, t)
    rng = b.rng
    b.detections.append(
        Detection(
            event_id=b.event_id(),
            serial=w.serial,
            home_key=w.home_key,
            sound_class=src.sound_class,
            sound=src.sound,
            score=_score(rng, fw, src.score),
            at=t,
            received_delay_s=round(float(rng.uniform(1.5, 25.0)), 1),
            firmware=fw,
            truth_label=src.label,
            truth_cause=src.cause,
            truth_resemblance=src.resemblance,
            source=src.key,
            clip_seed=int(rng.integers(0, 2**31 - 1)),
            staged_key=staged_key,
            private=private,
            ambiguous=src.key in ("tv", "dog") and rng.random() < 0.12,
        )
    )


def _home_sources(hh: Household) -> list[str]:
    keys = ["tv", "vacuum", "door", "kettle"]
    if "dog" in hh.traits:
        keys += ["dog", "dog_glass"]
    if "infant" in hh.traits:
        keys.append("cry")
    extra = {
        "cockatoo": ["cockatoo"],
        "road": ["road"],
        "piano": ["piano"],
        "building": ["works", "works_smoke"],
    }.get(hh.key, [])
    if "major_road" in hh.traits and hh.key != "road":
        extra.append("road_light")
    return keys + extra


def _plan_sources(
    b: _Builder, listening: list[_Window], works: tuple[dt.datetime, dt.datetime], days: float
) -> None:
    rng = b.rng
    models = {d.serial: d.hardware_model for d in b.devices}
    for hh in b.households:
        windows = _windows_of(listening, hh.key)
        if not windows:
            continue
        home_days = sum((w.end - w.start).total_seconds() for w in windows) / 86400.0
        # Two devices in one home hear the same household: count its days once.
        home_days /= max(1, len({w.serial for w in windows}))
        for skey in _home_sources(hh):
            light = skey == "road_light"
            src = SOURCES["road" if light else skey]
            rate = src.rate_per_day * (0.25 if light else 1.0)
            within = works if skey in ("works", "works_smoke") else None
            span_days = home_days
            if within is not None:
                span_days = min(home_days, (within[1] - within[0]).total_seconds() / 86400.0) * 5.0 / 7.0
            th100 = np.mean([src.th100_factor if models[w.serial] == "TH-100" else 1.0 for w in windows])
            kitchen = np.mean([src.kitchen_factor if w.room == "kitchen" else 1.0 for w in windows])
            expected = rate * span_days * float(th100) * float(kitchen)
            n = int(rng.poisson(expected))
            if skey == "cockatoo":
                n = max(n, math.ceil(0.8 * expected))  # the story needs its star
            for _ in range(n):
                placed = _place_event(b, windows, src.hours, weekdays_only=src.weekdays_only, within=within)
                if placed is None:
                    continue
                t, w = placed
                # The new firmware's effect: it keeps only this share of the events it would have sent.
                if _firmware_at(b, w.serial, t) == FIRMWARE_NEW and rng.random() >= src.new_firmware_factor:
                    continue
                _add_detection(b, src, t, w)


def _plan_one_offs(b: _Builder, listening: list[_Window]) -> None:
    """Burnt toast setting off the alarm, a dropped glass, and two private conversations."""
    rng = b.rng
    ordinary = [h for h in b.households if h.key.startswith("home-")] or [
        h for h in b.households if h.key not in ("cockatoo", "erased", "mover_from")
    ]
    kitchens = [h for h in ordinary if any(w.room == "kitchen" for w in _windows_of(listening, h.key))]
    pool = kitchens or ordinary
    picks = [
        (SOURCES["toast"], h)
        for h in (pool[int(i)] for i in rng.choice(len(pool), min(3, len(pool)), replace=False))
    ]
    picks.append((SOURCES["dropped_glass"], ordinary[int(rng.integers(0, len(ordinary)))]))
    for src, hh in picks:
        placed = _place_event(b, _windows_of(listening, hh.key), src.hours)
        if placed:
            _add_detection(b, src, *placed)
    chatty = [ordinary[int(i)] for i in rng.choice(len(ordinary), min(2, len(ordinary)), replace=False)]
    for hh in chatty:
        mid = (b.start + (b.end - b.start) * 0.35, b.start + (b.end - b.start) * 0.65)
        placed = _place_event(b, _windows_of(listening, hh.key), SOURCES["chat"].hours, within=mid)
        if placed:
            _add_detection(b, SOURCES["chat"], *placed, private=True)


def _ensure_heard(b: _Builder, listening: list[_Window], keys: Sequence[str], at_least: int = 2) -> None:
    """The stories of the moved device and the erased home need alerts, whatever the draws gave."""
    for key in keys:
        have = sum(d.home_key == key for d in b.detections)
        for src_key in ("door", "tv", "vacuum")[: max(0, at_least - have)]:
            src = SOURCES[src_key]
            placed = _place_event(b, _windows_of(listening, key), src.hours, tries=200)
            if placed:
                _add_detection(b, src, *placed)


def _ensure_cockatoo_leads(b: _Builder, listening: list[_Window], margin: int = 3) -> None:
    """The cockatoo's home leads the baby-cry false alarms by a clear margin at every size."""
    counts: dict[str, int] = {}
    for d in b.detections:
        if d.sound_class == "baby_cry" and d.truth_label == "false_alarm":
            counts[d.home_key] = counts.get(d.home_key, 0) + 1
    others = max((n for k, n in counts.items() if k != "cockatoo"), default=0)
    src = SOURCES["cockatoo"]
    windows = _windows_of(listening, "cockatoo")
    for _ in range(max(0, others + margin - counts.get("cockatoo", 0))):
        placed = _place_event(b, windows, src.hours, tries=200)
        if placed:
            _add_detection(b, src, *placed)


def _ensure_ambiguous(b: _Builder, at_least: int = 2) -> None:
    """A couple of clips in the first half that a reviewer will not call at once (they go to a second
    reviewer, who disagrees with "unsure", so the adjudicator has something to settle)."""
    half = b.start + (b.end - b.start) / 2
    have = sum(d.ambiguous for d in b.detections)
    for i, d in enumerate(b.detections):
        if have >= at_least:
            break
        if not d.ambiguous and d.at < half and d.source in ("tv", "dog", "cockatoo", "door"):
            b.detections[i] = replace(d, ambiguous=True)
            have += 1


def _plan_staged(b: _Builder, listening: list[_Window], homes: int) -> None:
    """Test sounds played by the coordinator in about a third of the homes; some are missed."""
    rng = b.rng
    eligible = [
        h
        for h in b.households
        if h.key not in ("erased", "mover_from", "mover_to") and _windows_of(listening, h.key)
    ]
    count = max(2, round(homes / 3))
    chosen = [
        eligible[int(i)] for i in sorted(rng.choice(len(eligible), min(count, len(eligible)), replace=False))
    ]
    classes = list(SOUND_CLASSES)
    n = 0
    planned: list[tuple[Household, str, dt.datetime, _Window]] = []
    for hh in chosen:
        per_home = 2 + int(rng.random() < 0.35)
        order = [classes[int(i)] for i in rng.permutation(len(classes))][:per_home]
        for cls in order:
            placed = _place_event(b, _windows_of(listening, hh.key), ((10.0, 16.0),), weekdays_only=True)
            if placed is None:
                continue
            planned.append((hh, cls, *placed))
    detected_flags = [bool(rng.random() < STAGED_SOURCES[cls][4]) for _, cls, _, _ in planned]
    # Some tests are always missed: at least one in three, two from six on.
    for _ in range(min(2, len(planned) // 3) - sum(not f for f in detected_flags)):
        hits = [i for i, f in enumerate(detected_flags) if f]
        detected_flags[hits[int(rng.integers(0, len(hits)))]] = False
    if planned and not any(detected_flags):
        detected_flags[0] = True
    for (hh, cls, t, w), detected in zip(planned, detected_flags, strict=True):
        n += 1
        text, level, length, latency, _p = STAGED_SOURCES[cls]
        duration = float(rng.uniform(*length))
        key = f"staged-{n:02d}"
        b.staged.append(
            StagedTest(
                key,
                hh.key,
                cls,
                t,
                _round_s(t + dt.timedelta(seconds=duration)) + dt.timedelta(seconds=1),
                text,
                level,
                detected,
            )
        )
        if detected:
            src = Source(
                "staged",
                {"smoke_alarm": "smoke_alarm_t3"}.get(cls, cls),
                cls,
                "confirmed",
                None,
                None,
                0.0,
                ((10.0, 16.0),),
                score=(6.0, 1.3),
            )
            lag = dt.timedelta(seconds=round(float(rng.uniform(*latency)), 1))
            _add_detection(b, src, t + lag, w, staged_key=key)


def _beats_for(b: _Builder, spec: DeviceSpec) -> tuple[Beat, ...]:
    """Daily heartbeats over each listening stretch; a last listening beat, then a not-listening
    one, when the device is switched off, taken away or loses its network."""
    rng = b.rng
    windows = sorted((w for w in _listening(b) if w.serial == spec.serial), key=lambda w: w.start)
    out: list[Beat] = []

    def fw(t: dt.datetime) -> str:
        return FIRMWARE_NEW if spec.upgrade_at is not None and t >= spec.upgrade_at else FIRMWARE_OLD

    for w in windows:
        t = w.start
        out.append(Beat(t, True, fw(t)))
        last = w.end - dt.timedelta(minutes=1)
        while True:
            step = dt.timedelta(seconds=HEARTBEAT_INTERVAL_S - float(rng.uniform(0.0, 1200.0)))
            nxt = _round_s(t + step)
            if spec.upgrade_at is not None and t < spec.upgrade_at <= nxt and spec.upgrade_at < last:
                nxt = spec.upgrade_at + dt.timedelta(minutes=4)  # the device reports in after updating
            if nxt >= last:
                break
            out.append(Beat(nxt, True, fw(nxt)))
            t = nxt
        out.append(Beat(_round_s(last), True, fw(last)))
        if w.end < b.end:
            out.append(Beat(w.end, False, fw(w.end)))
    return tuple(sorted(out, key=lambda x: x.at))


def _assign_extras(b: _Builder, homes: int) -> None:
    """Homes recruited but not installed: candidates that would close the quota's gaps, and a no."""
    rng = b.rng
    count = max(3, round(homes / 6))
    kinds = ["screened_elderly", "candidate_road", "declined", "consented"]
    kinds += ["candidate"] * (count - len(kinds))
    for i, kind in enumerate(kinds[:count]):
        tr: set[str] = set()
        if kind == "screened_elderly":
            tr.add("aged_75")
        if kind == "candidate_road":
            tr.add("major_road")
        if kind == "consented" and rng.random() < 0.5:
            tr.add("infant")
        ftr = frozenset(tr)
        t0 = b.start + dt.timedelta(days=float(rng.uniform(3.0, 10.0)) + i)
        steps = [StateStep(_round_s(t0), "candidate", "Answered the pilot's letter")]
        if kind in ("screened_elderly", "declined", "consented"):
            steps.append(StateStep(_round_s(t0 + dt.timedelta(days=5)), "screened", "Phone screening done"))
        if kind == "declined":
            steps.append(
                StateStep(_round_s(t0 + dt.timedelta(days=9)), "declined", "Decided not to take part")
            )
        consent = None
        if kind == "consented":
            at = _round_s(t0 + dt.timedelta(days=8))
            steps.append(StateStep(at, "consented", "Consent form C-2.1 signed; installation booked"))
            consent = ConsentTerms("C-2.1", at.astimezone(_zone()).date(), True, 120)
        dwelling, occupants = _dwelling(rng, ftr)
        b.households.append(
            Household(
                key=f"extra-{i + 1:02d}",
                character=_general_character(ftr, dwelling),
                traits=ftr,
                dwelling=dwelling,
                occupants=occupants,
                steps=tuple(steps),
                consent=consent,
                contact=b.contact(_access_notes("", ftr), 1 if "aged_75" in ftr else 2),
            )
        )


def _quota(homes: int) -> tuple[QuotaLine, ...]:
    return (
        QuotaLine("Homes in the pilot", None, homes, None),
        QuotaLine("Homes with an infant under 2", "infant", max(2, round(homes * 0.2)), None),
        QuotaLine("Homes with a dog", "dog", max(2, round(homes * 0.12)), None),
        QuotaLine("Homes with a resident aged 75 or over", "aged_75", max(2, round(homes * 0.14)), None),
        QuotaLine("Homes where an instrument is played", "instrument", 2, None),
        QuotaLine("Homes within 50 m of a major road", "major_road", max(2, round(homes * 0.08)), None),
        QuotaLine("Homes under a flight path", "flight_path", max(1, round(homes * 0.05)), None),
        QuotaLine("Flats", "dwelling:flat", max(2, round(homes * 0.2)), max(4, round(homes * 0.5))),
    )


# ---------------------------------------------------------------------------------------
# Describing it


def describe(plan: Plan) -> list[str]:
    """A few lines on the scenario for the command line and the docs."""
    fa = [d for d in plan.detections if d.truth_label == "false_alarm"]
    by_source: dict[str, int] = {}
    for d in fa:
        by_source[d.source] = by_source.get(d.source, 0) + 1
    baby_fa = [d for d in fa if d.sound_class == "baby_cry"]
    cockatoo = sum(d.source == "cockatoo" for d in baby_fa)
    installed = [h for h in plan.households if not h.key.startswith("extra-")]
    return [
        f"{TRIAL_NAME} ({TRIAL_CODE}), {plan.starts_on} to {plan.ends_on}, {plan.weeks} weeks, "
        f"time zone {TIMEZONE}",
        f"{len(installed)} homes installed, {len(plan.households) - len(installed)} more in recruitment; "
        f"{len(plan.devices)} devices ({', '.join(HARDWARE_MODELS)}), firmware {FIRMWARE_OLD} -> "
        f"{FIRMWARE_NEW} from week {1 + int(0.5 * plan.weeks)}",
        f"{len(plan.detections)} alerts ({len(fa)} false alarms; cockatoo {cockatoo} of "
        f"{len(baby_fa)} baby-cry false alarms), {len(plan.staged)} staged tests "
        f"({sum(not s.detected for s in plan.staged)} missed)",
        f"{sum(len(v) for v in plan.beats.values())} heartbeats, {len(plan.outages)} offline stretches",
    ]
