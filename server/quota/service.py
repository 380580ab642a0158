"""The trial's recruitment quota: targets (at least / at most N homes with an attribute), the home
states that count, the report of counts and shortfalls, and the homes whose departure left a target
short. Services flush and never commit; the counting itself is pure (``rules``).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.errors import NotFound, ValidationFailed
from server.households import catalogue
from server.households.models import AttributeDefinition, Home, HomeState, HomeStateChange
from server.quota import rules
from server.quota.models import QuotaTarget
from server.trials.models import Trial

Actor = User | str


def list_targets(session: Session, trial: Trial) -> list[QuotaTarget]:
    return list(
        session.scalars(
            select(QuotaTarget)
            .where(QuotaTarget.trial_id == trial.id)
            .order_by(QuotaTarget.position, QuotaTarget.id)
        )
    )


def _target_label(defn: AttributeDefinition | None, value: Any) -> str:
    if defn is None:
        return "All homes"
    if value is None:
        return f"{defn.label}: any answer"
    return f"{defn.label}: {catalogue.format_value(value)}"


def add_target(
    session: Session,
    trial: Trial,
    *,
    attribute_key: str | None,
    value: Any = None,
    min_count: int | None = None,
    max_count: int | None = None,
    label: str = "",
    actor: Actor = "cli",
) -> QuotaTarget:
    """A quota target: at least ``min_count`` / at most ``max_count`` homes with attribute = value."""
    errors: dict[str, str] = {}
    defn = None
    parsed = None
    if attribute_key:
        defn = session.scalar(
            select(AttributeDefinition).where(
                AttributeDefinition.trial_id == trial.id, AttributeDefinition.key == attribute_key
            )
        )
        if defn is None:
            errors["attribute_key"] = f"'{attribute_key}' is not an attribute of trial {trial.code}."
        else:
            try:
                parsed = catalogue.parse_value(defn, value)
            except ValueError as exc:
                errors["value"] = str(exc)
    for name, n in (("min_count", min_count), ("max_count", max_count)):
        if n is not None and not 0 <= n <= 100000:
            errors[name] = "A count is a whole number from 0."
    if min_count is None and max_count is None:
        errors["min_count"] = "Give a minimum, a maximum or both."
    elif min_count is not None and max_count is not None and min_count > max_count:
        errors["max_count"] = "The maximum cannot be below the minimum."
    label = (label or "").strip()
    if len(label) > 200:
        errors["label"] = "At most 200 characters."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    pos = (
        session.scalar(select(func.max(QuotaTarget.position)).where(QuotaTarget.trial_id == trial.id)) or 0
    ) + 1
    target = QuotaTarget(
        trial_id=trial.id,
        label=label or _target_label(defn, parsed),
        attribute_key=attribute_key or None,
        value=parsed,
        min_count=min_count,
        max_count=max_count,
        position=pos,
    )
    session.add(target)
    session.flush()
    audit.record(
        session,
        actor,
        "quota.target_add",
        "quota_target",
        target.id,
        {"trial": trial.code, "label": target.label, "min": min_count, "max": max_count},
    )
    return target


def delete_target(session: Session, trial: Trial, target_id: int, *, actor: Actor = "cli") -> None:
    target = session.get(QuotaTarget, target_id)
    if target is None or target.trial_id != trial.id:
        raise NotFound(f"Trial {trial.code} has no quota target {target_id}.", code="unknown_target")
    audit.record(session, actor, "quota.target_delete", "quota_target", target.id, {"label": target.label})
    session.execute(delete(QuotaTarget).where(QuotaTarget.id == target_id))
    session.flush()


def set_counting_states(
    session: Session, trial: Trial, states: Iterable[str], *, actor: Actor = "cli"
) -> list[str]:
    chosen = [s for s in HomeState.all if s in set(states)]
    bad = set(states) - set(HomeState.all)
    if bad or not chosen:
        raise ValidationFailed(
            "Pick at least one home state that counts toward the quota.",
            {"states": "Pick at least one state."},
        )
    trial.quota_states = chosen
    session.flush()
    audit.record(session, actor, "quota.states", "trial", trial.id, {"states": chosen})
    return chosen


def home_facts(session: Session, trial: Trial) -> list[rules.HomeFacts]:
    rows = session.execute(select(Home.code, Home.state, Home.attributes).where(Home.trial_id == trial.id))
    return [rules.HomeFacts(c, s, a or {}) for c, s, a in rows]


def quota_targets(session: Session, trial: Trial) -> list[rules.Target]:
    return [
        rules.Target(t.id, t.label, t.attribute_key, t.value, t.min_count, t.max_count)
        for t in list_targets(session, trial)
    ]


def quota_report(session: Session, trial: Trial) -> rules.QuotaReport:
    return rules.evaluate(quota_targets(session, trial), home_facts(session, trial), trial.quota_states)


def departures(session: Session, trial: Trial) -> list[tuple[str, dt.datetime, dict[str, Any]]]:
    """Homes that left the counted states by withdrawal or pause and are still out: (code, at, attributes)."""
    counting = set(trial.quota_states)
    rows = session.execute(
        select(Home.code, HomeStateChange.at, Home.attributes, HomeStateChange.from_state, Home.state)
        .join(Home, Home.id == HomeStateChange.home_id)
        .where(
            Home.trial_id == trial.id, HomeStateChange.to_state.in_([HomeState.withdrawn, HomeState.paused])
        )
        .order_by(HomeStateChange.at.desc())
    )
    out = []
    seen = set()
    for code, at, attrs, from_state, now_state in rows:
        if code in seen or from_state not in counting or now_state in counting:
            continue
        seen.add(code)
        out.append((code, at, attrs or {}))
    return out


# --- the page's and API's reading -------------------------------------------------------------


@dataclass(frozen=True)
class Departure:
    code: str
    at: dt.datetime


@dataclass(frozen=True)
class QuotaView:
    trial: Trial
    report: rules.QuotaReport
    catalogue: list[AttributeDefinition]
    # Per short target: the homes matching it that left the counted states by withdrawal or pause.
    departures: dict[int, list[Departure]]
    rule: str = rules.COVER_RULE

    def suggestion_labels(self, s: rules.Suggestion) -> list[str]:
        labels = {t.target.id: t.target.label for t in self.report.targets}
        return [labels[i] for i in s.helps]


def quota_view(session: Session, trial: Trial) -> QuotaView:
    report = quota_report(session, trial)
    gone = departures(session, trial)
    warn: dict[int, list[Departure]] = {}
    for s in report.short:
        hits = [Departure(code, at) for code, at, attrs in gone if rules.matches(s.target, attrs)]
        if hits:
            warn[s.target.id] = hits
    return QuotaView(trial, report, catalogue.list_catalogue(session, trial), warn)
