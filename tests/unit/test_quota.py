"""Quota maths on cases worked out by hand (no database)."""

from __future__ import annotations

from server.quota import rules as quota
from server.quota.rules import HomeFacts, Target

DOG = Target(1, "Dog: yes", "dog", True, 2, None)
FLAT = Target(2, "Flats", "dwelling_type", "flat", 1, 2)
INFANT = Target(3, "Infant: yes", "infant_under_2", True, 2, None)
TOTAL = Target(4, "All homes", None, None, 5, None)
COUNTING = ("consented", "installed", "active")


def home(code: str, state: str, **attrs: object) -> HomeFacts:
    return HomeFacts(code, state, attrs)


# Counted homes: H-1 (dog, flat), H-2 (flat), H-3 (house). Not counted: H-9 (withdrawn dog),
# H-8 (paused infant). Candidates C-1 .. C-5 as in the greedy case below.
COUNTED = [
    home("H-1", "active", dog=True, dwelling_type="flat"),
    home("H-2", "installed", dog=False, dwelling_type="flat"),
    home("H-3", "consented", dwelling_type="detached house"),
    home("H-9", "withdrawn", dog=True),
    home("H-8", "paused", infant_under_2=True),
]
CANDIDATES = [
    home("C-1", "candidate", dog=True, dwelling_type="flat"),
    home("C-2", "screened", dog=True, infant_under_2=True, dwelling_type="terraced house"),
    home("C-3", "candidate", infant_under_2=True),
    home("C-4", "candidate"),
    home("C-5", "candidate", infant_under_2=True, dog=True),
]


def test_counts_only_homes_in_counting_states():
    by_id = {s.target.id: s for s in quota.count_targets([DOG, FLAT, INFANT, TOTAL], COUNTED, COUNTING)}
    # Worked by hand: dog among counted = H-1 only (H-9 withdrawn); flats H-1, H-2; no counted infant
    # (H-8 paused); total 3.
    assert (by_id[1].count, by_id[1].homes, by_id[1].shortfall, by_id[1].status) == (1, ("H-1",), 1, "short")
    assert (by_id[2].count, by_id[2].homes, by_id[2].status, by_id[2].excess) == (2, ("H-1", "H-2"), "met", 0)
    assert (by_id[3].count, by_id[3].shortfall) == (0, 2)
    assert (by_id[4].count, by_id[4].shortfall) == (3, 2)


def test_counting_states_are_configurable():
    with_paused = quota.count_targets([INFANT], COUNTED, (*COUNTING, "paused"))
    assert with_paused[0].count == 1 and with_paused[0].homes == ("H-8",)


def test_excess_above_maximum():
    three_flats = [*COUNTED, home("H-4", "active", dwelling_type="flat")]
    (s,) = quota.count_targets([FLAT], three_flats, COUNTING)
    assert (s.count, s.excess, s.shortfall, s.status) == (3, 1, 0, "over")


def test_yes_no_never_matches_the_number_one():
    t = Target(9, "Occupants: 1", "occupants", 1, 1, None)
    homes = [home("A", "active", occupants=True), home("B", "active", occupants=1)]
    (s,) = quota.count_targets([t], homes, COUNTING)
    assert s.homes == ("B",)


def test_value_none_matches_any_answer():
    t = Target(9, "Dwelling answered", "dwelling_type", None, 1, None)
    homes = [
        home("A", "active", dwelling_type="flat"),
        home("B", "active", dwelling_type=""),
        home("C", "active"),
        home("D", "active", occupants=0),
    ]
    assert quota.count_targets([t], homes, COUNTING)[0].homes == ("A",)
    n = Target(10, "Occupants answered", "occupants", None, 1, None)
    assert quota.count_targets([n], [*homes, home("E", "active", occupants=2)], COUNTING)[0].homes == ("E",)


def test_greedy_cover_worked_case():
    # Shortfalls before: dog 1, infant 2, total 2; flats is at its maximum (2 of 1..2), so C-1 (a
    # flat) is never picked. Round 1: C-2 and C-5 each help 3 short targets with 1+2+2 = 5 places;
    # the tie goes to the lower code, C-2. After it: dog 0, infant 1, total 1. Round 2: C-3 and C-5
    # each help infant and total (2 targets, 2 places); the tie goes to C-3. Everything is closed.
    report = quota.evaluate([DOG, FLAT, INFANT, TOTAL], COUNTED + CANDIDATES, COUNTING)
    assert [(s.code, s.helps) for s in report.suggestions] == [("C-2", (1, 3, 4)), ("C-3", (3, 4))]
    assert report.remaining_after == {1: 0, 3: 0, 4: 0}


def test_greedy_cover_reports_what_stays_open():
    # Only C-4 (no attributes) is available: it helps the total only, once.
    report = quota.evaluate([DOG, TOTAL], COUNTED + [CANDIDATES[3]], COUNTING)
    assert [(s.code, s.helps) for s in report.suggestions] == [("C-4", (4,))]
    assert report.remaining_after == {1: 1, 4: 1}


def test_greedy_prefers_the_larger_shortfall_on_equal_counts():
    # Two short targets, one home each would help: dog short by 1, infant short by 2. X helps dog,
    # Y helps infant; both help one target, so the tie-break (places) picks Y first.
    dog = Target(1, "dog", "dog", True, 1, None)
    infant = Target(2, "infant", "infant_under_2", True, 2, None)
    pool = [home("X", "candidate", dog=True), home("Y", "candidate", infant_under_2=True)]
    report = quota.evaluate([dog, infant], pool, COUNTING)
    assert [s.code for s in report.suggestions] == ["Y", "X"]
    assert report.remaining_after == {1: 0, 2: 1}


def test_no_suggestion_when_nothing_is_short():
    report = quota.evaluate([FLAT], COUNTED + CANDIDATES, COUNTING)
    assert report.suggestions == () and report.short == ()


def test_counted_states_are_not_in_the_candidate_pool():
    # With "screened" counting, C-2 counts (dog and infant) and is no longer a suggestion.
    report = quota.evaluate([DOG, INFANT], COUNTED + CANDIDATES, (*COUNTING, "screened"))
    by_id = {s.target.id: s for s in report.targets}
    assert by_id[1].count == 2 and by_id[3].count == 1
    assert "C-2" not in [s.code for s in report.suggestions]


def test_totals_by_state_and_counted():
    report = quota.evaluate([TOTAL], COUNTED + CANDIDATES, COUNTING)
    assert report.by_state == {
        "active": 1,
        "installed": 1,
        "consented": 1,
        "withdrawn": 1,
        "paused": 1,
        "candidate": 4,
        "screened": 1,
    }
    assert report.counted == 3


def test_withdrawal_drop_is_flagged_only_for_targets_that_fell_short():
    before = quota.evaluate([DOG, FLAT], COUNTED[:3] + [home("H-5", "active", dog=True)], COUNTING)
    # H-5 withdraws: dog goes from 2 (met) to 1 (short); flats are unchanged.
    after = quota.evaluate([DOG, FLAT], COUNTED[:3] + [home("H-5", "withdrawn", dog=True)], COUNTING)
    assert [s.target.id for s in quota.newly_short(before, after)] == [1]
    assert quota.newly_short(after, after) == []
