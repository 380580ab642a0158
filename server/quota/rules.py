"""Recruitment quota maths: which homes count toward each target, shortfalls and excess, and a
greedy cover of the unmet targets by candidate homes.

Pure functions over plain values; no database access.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

# Homes still being recruited: the pool the greedy cover draws from.
CANDIDATE_STATES = ("candidate", "screened")

COVER_RULE = (
    "Suggestions are picked one at a time: each pick is the candidate that helps the most "
    "targets still short (ties go to the one helping the larger shortfalls, then to the lower "
    "code), and no pick pushes a target past its maximum."
)


@dataclass(frozen=True)
class Target:
    """At least ``min_count`` and at most ``max_count`` counted homes matching the target.

    ``attribute_key`` None matches every home (a total); ``value`` None with a key matches any
    answer that is yes, a non-empty option or a number above zero.
    """

    id: int
    label: str
    attribute_key: str | None
    value: Any
    min_count: int | None
    max_count: int | None


@dataclass(frozen=True)
class HomeFacts:
    code: str
    state: str
    attributes: Mapping[str, Any]


@dataclass(frozen=True)
class TargetStatus:
    target: Target
    count: int
    homes: tuple[str, ...]  # codes of the counted homes behind the count, sorted

    @property
    def shortfall(self) -> int:
        t = self.target
        return max(0, t.min_count - self.count) if t.min_count is not None else 0

    @property
    def excess(self) -> int:
        t = self.target
        return max(0, self.count - t.max_count) if t.max_count is not None else 0

    @property
    def status(self) -> str:
        """``short`` below the minimum, ``over`` above the maximum, else ``met``."""
        if self.shortfall:
            return "short"
        if self.excess:
            return "over"
        return "met"


@dataclass(frozen=True)
class Suggestion:
    code: str
    state: str
    helps: tuple[int, ...]  # ids of the still-short targets this pick helps, in target order


@dataclass(frozen=True)
class QuotaReport:
    targets: tuple[TargetStatus, ...]
    by_state: Mapping[str, int]
    counted: int
    counting_states: tuple[str, ...]
    suggestions: tuple[Suggestion, ...]
    # Shortfall of each short target once every suggestion is recruited.
    remaining_after: Mapping[int, int] = field(default_factory=dict)

    @property
    def short(self) -> tuple[TargetStatus, ...]:
        return tuple(s for s in self.targets if s.status == "short")


def _same(a: Any, b: Any) -> bool:
    # True == 1 in Python; a yes/no answer must not match the number 1.
    if isinstance(a, bool) or isinstance(b, bool):
        return isinstance(a, bool) and isinstance(b, bool) and a == b
    return bool(a == b)


def _answered(v: Any) -> bool:
    if isinstance(v, bool):
        return v
    if isinstance(v, int | float):
        return v > 0
    if isinstance(v, str):
        return v.strip() != ""
    return False


def matches(target: Target, attributes: Mapping[str, Any]) -> bool:
    if target.attribute_key is None:
        return True
    if target.attribute_key not in attributes:
        return False
    v = attributes[target.attribute_key]
    if target.value is None:
        return _answered(v)
    return _same(v, target.value)


def count_targets(
    targets: Sequence[Target], homes: Iterable[HomeFacts], counting_states: Iterable[str]
) -> tuple[TargetStatus, ...]:
    states = set(counting_states)
    counted = [h for h in homes if h.state in states]
    out = []
    for t in targets:
        codes = tuple(sorted(h.code for h in counted if matches(t, h.attributes)))
        out.append(TargetStatus(t, len(codes), codes))
    return tuple(out)


def greedy_cover(
    statuses: Sequence[TargetStatus], candidates: Iterable[HomeFacts]
) -> tuple[tuple[Suggestion, ...], dict[int, int]]:
    """Candidates that would close the unmet targets if recruited, picked greedily (see COVER_RULE).

    Returns the picks in order and the shortfall left on each short target after all of them.
    The greedy rule is the classic one for covering problems: it is not always the smallest
    possible set, but each pick is easy to explain.
    """
    remaining = {s.target.id: s.shortfall for s in statuses if s.shortfall > 0}
    room = {s.target.id: s.target.max_count - s.count for s in statuses if s.target.max_count is not None}
    pool = sorted(candidates, key=lambda h: h.code)
    picks: list[Suggestion] = []
    while any(v > 0 for v in remaining.values()) and pool:
        best: tuple[tuple[int, int], HomeFacts, list[int]] | None = None
        for home in pool:
            matched = [s.target.id for s in statuses if matches(s.target, home.attributes)]
            if any(room.get(tid, 1) <= 0 for tid in matched):
                continue  # recruiting it would push a target past its maximum
            helped = [tid for tid in matched if remaining.get(tid, 0) > 0]
            if not helped:
                continue
            key = (len(helped), sum(remaining[tid] for tid in helped))
            if best is None or key > best[0]:  # pool is in code order, so ties keep the lower code
                best = (key, home, helped)
        if best is None:
            break
        _, home, helped = best
        matched = [s.target.id for s in statuses if matches(s.target, home.attributes)]
        for tid in helped:
            remaining[tid] -= 1
        for tid in matched:
            if tid in room:
                room[tid] -= 1
        picks.append(Suggestion(home.code, home.state, tuple(helped)))
        pool.remove(home)
    return tuple(picks), remaining


def evaluate(
    targets: Sequence[Target],
    homes: Sequence[HomeFacts],
    counting_states: Iterable[str],
    candidate_states: Iterable[str] = CANDIDATE_STATES,
) -> QuotaReport:
    """Count every target, total the homes by state, and suggest candidates for the shortfalls."""
    counting = tuple(counting_states)
    statuses = count_targets(targets, homes, counting)
    pool_states = set(candidate_states) - set(counting)
    suggestions, remaining = greedy_cover(statuses, [h for h in homes if h.state in pool_states])
    by_state = Counter(h.state for h in homes)
    counted = sum(1 for h in homes if h.state in set(counting))
    return QuotaReport(statuses, dict(by_state), counted, counting, suggestions, remaining)


def newly_short(before: QuotaReport, after: QuotaReport) -> list[TargetStatus]:
    """Targets whose count fell and now sit below their minimum (for the withdrawal warning)."""
    old = {s.target.id: s.count for s in before.targets}
    return [s for s in after.targets if s.status == "short" and s.count < old.get(s.target.id, s.count)]
