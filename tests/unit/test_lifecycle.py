"""Home lifecycle rules, attribute values and interval arithmetic (pure; no database)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import pytest

from server.households import catalogue, lifecycle, timeline


def ok(current: str, target: str, consent: bool = True, device: bool = True) -> lifecycle.Refusal | None:
    return lifecycle.check("H-0001", current, target, has_consent=consent, has_device=device)


@pytest.mark.parametrize(
    "current,target",
    [
        ("candidate", "screened"),
        ("candidate", "declined"),
        ("screened", "consented"),
        ("screened", "declined"),
        ("consented", "installed"),
        ("consented", "withdrawn"),
        ("installed", "active"),
        ("installed", "paused"),
        ("active", "paused"),
        ("active", "withdrawn"),
        ("paused", "active"),
        ("paused", "withdrawn"),
        ("declined", "candidate"),
    ],
)
def test_allowed_steps(current, target):
    assert ok(current, target) is None


@pytest.mark.parametrize(
    "current,target",
    [
        ("candidate", "installed"),
        ("candidate", "active"),
        ("screened", "active"),
        ("consented", "active"),
        ("active", "candidate"),
        ("active", "installed"),
        ("declined", "consented"),
        ("withdrawn", "active"),
        ("withdrawn", "candidate"),
        ("installed", "consented"),
    ],
)
def test_illegal_steps_are_refused_with_a_sentence(current, target):
    r = ok(current, target)
    assert r is not None and r.code == "illegal_transition"
    assert "H-0001" in r.message and r.message.endswith(".")


def test_illegal_message_lists_the_way_forward():
    r = ok("candidate", "installed")
    assert r is not None
    assert r.message == (
        "H-0001 cannot go from candidate to installed; from candidate it can go to: screened, declined."
    )


def test_withdrawal_is_final():
    r = ok("withdrawn", "active")
    assert r is not None and "withdrawal is final" in r.message


def test_same_state_and_unknown_state():
    assert ok("active", "active").code == "illegal_transition"  # type: ignore[union-attr]
    r = ok("active", "sleeping")
    assert r is not None and "'sleeping' is not a home state" in r.message


def test_consent_gate():
    r = ok("screened", "consented", consent=False)
    assert r is not None and r.code == "consent_missing"
    r = ok("consented", "installed", consent=False)
    assert r is not None and r.code == "consent_missing"
    r = ok("paused", "active", consent=False)
    assert r is not None and r.code == "consent_missing"
    # Leaving needs no consent.
    assert ok("consented", "withdrawn", consent=False) is None


def test_device_gate():
    r = ok("consented", "installed", device=False)
    assert r is not None and r.code == "no_device_installed"
    assert ok("installed", "paused", device=False) is None


# --- attribute values ---------------------------------------------------------------------------


@dataclass
class Spec:
    key: str
    label: str
    kind: str
    options: list[str]
    min_value: int | None = None
    max_value: int | None = None


YES_NO = Spec("dog", "Dog", "yes_no", [])
ONE_OF = Spec("dwelling_type", "Dwelling type", "one_of", ["flat", "detached house"])
NUMBER = Spec("occupants", "Number of occupants", "whole_number", [], 1, 30)


@pytest.mark.parametrize(
    "raw,expected",
    [("yes", True), ("No", False), (True, True), ("1", True), ("", None), (None, None), ("  ", None)],
)
def test_yes_no_values(raw, expected):
    assert catalogue.parse_value(YES_NO, raw) is expected


def test_one_of_values_keep_the_catalogue_spelling():
    assert catalogue.parse_value(ONE_OF, "FLAT") == "flat"
    with pytest.raises(ValueError, match=r"Dwelling type: 'bungalow' is not one of: flat, detached house\."):
        catalogue.parse_value(ONE_OF, "bungalow")


@pytest.mark.parametrize("raw,expected", [("3", 3), (4, 4), (2.0, 2), ("+5", 5)])
def test_whole_numbers(raw, expected):
    assert catalogue.parse_value(NUMBER, raw) == expected


@pytest.mark.parametrize(
    "raw,message",
    [
        ("2.5", "is not a whole number"),
        ("three", "is not a whole number"),
        ("0", "below the smallest allowed value, 1"),
        ("31", "above the largest allowed value, 30"),
        (True, "not yes or no"),
    ],
)
def test_bad_whole_numbers(raw, message):
    with pytest.raises(ValueError, match=message):
        catalogue.parse_value(NUMBER, raw)


def test_validate_attributes_collects_every_problem():
    clean, errors = catalogue.validate_attributes(
        [YES_NO, ONE_OF, NUMBER], {"dog": "yes", "dwelling_type": "castle", "occupants": "", "pool": "yes"}
    )
    assert clean == {"dog": True}
    assert set(errors) == {"dwelling_type", "pool"}
    assert errors["pool"] == "'pool' is not an attribute in this trial's catalogue."


def test_default_catalogue_covers_the_household_types():
    keys = [d["key"] for d in catalogue.DEFAULT_CATALOGUE]
    assert len(keys) == len(set(keys)) == 12
    kinds = {d["key"]: d["kind"] for d in catalogue.DEFAULT_CATALOGUE}
    assert kinds["dwelling_type"] == "one_of" and kinds["occupants"] == "whole_number"
    assert sum(1 for k in kinds.values() if k == "yes_no") == 10


# --- intervals ----------------------------------------------------------------------------------


def t(day: int, hour: int = 0) -> dt.datetime:
    return dt.datetime(2026, 3, day, hour, tzinfo=dt.UTC)


def test_overlap_is_half_open():
    assert timeline.overlaps(t(1), t(2), t(2), t(3)) is False  # touching: a move
    assert timeline.overlaps(t(1), t(3), t(2), t(4)) is True
    assert timeline.overlaps(t(1), None, t(5), t(6)) is True  # open-ended
    assert timeline.overlaps(t(5), t(6), t(1), t(5)) is False


def test_union_merges_overlapping_and_touching():
    assert timeline.union([(t(3), t(4)), (t(1), t(2)), (t(2), t(3, 5)), (t(10), t(10))]) == [(t(1), t(4))]


def test_hours_per_week_split_at_local_monday():
    # 2026-03-02 is a Monday. 20:00 Sunday 1 March to 04:00 Monday 2 March UTC is 8 h; in UTC the week
    # boundary falls at 2 March 00:00, so 4 h land in the week of 23 Feb and 4 h in the week of 2 March.
    rows = timeline.hours_per_week(
        [(t(1, 20), t(2, 4))], "UTC", first_week=dt.date(2026, 2, 23), last_week=dt.date(2026, 3, 9)
    )
    assert [(r.week_start, r.hours) for r in rows] == [
        (dt.date(2026, 2, 23), 4.0),
        (dt.date(2026, 3, 2), 4.0),
        (dt.date(2026, 3, 9), 0.0),
    ]


def test_hours_per_week_in_a_zone_ahead_of_utc():
    # In Europe/Helsinki (UTC+2 in winter) the Monday starts at Sunday 22:00 UTC: of the 8 h, 2 h
    # fall before it and 6 h after.
    rows = timeline.hours_per_week(
        [(t(1, 20), t(2, 4))],
        "Europe/Helsinki",
        first_week=dt.date(2026, 2, 23),
        last_week=dt.date(2026, 3, 2),
    )
    assert [r.hours for r in rows] == [2.0, 6.0]


def test_hours_per_week_counts_overlaps_once():
    rows = timeline.hours_per_week(
        [(t(3, 0), t(3, 10)), (t(3, 5), t(3, 12))],
        "UTC",
        first_week=dt.date(2026, 3, 2),
        last_week=dt.date(2026, 3, 2),
    )
    assert rows[0].hours == 12.0
