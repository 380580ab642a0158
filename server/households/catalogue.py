"""The per-trial catalogue of household attributes, its default contents, and value checking.

An attribute is yes/no, one-of (with its options) or a whole number (with optional bounds).
``parse_value`` and ``validate_attributes`` are pure; the rest reads and writes the catalogue.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Any, Protocol

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server import audit
from server.auth.models import User
from server.errors import Conflict, ValidationFailed
from server.households.models import AttributeDefinition
from server.trials.models import Trial

KINDS = ("yes_no", "one_of", "whole_number")
KIND_LABELS = {"yes_no": "yes / no", "one_of": "one of", "whole_number": "whole number"}

DEFAULT_CATALOGUE: tuple[dict[str, Any], ...] = (
    {"key": "infant_under_2", "label": "Infant under 2", "kind": "yes_no"},
    {"key": "children_2_to_12", "label": "Children aged 2 to 12", "kind": "yes_no"},
    {"key": "dog", "label": "Dog", "kind": "yes_no"},
    {"key": "cat", "label": "Cat", "kind": "yes_no"},
    {"key": "other_pets", "label": "Other pets", "kind": "yes_no"},
    {"key": "resident_75_plus", "label": "Resident aged 75 or over", "kind": "yes_no"},
    {"key": "instrument_played", "label": "Musical instrument played at home", "kind": "yes_no"},
    {"key": "building_works_nearby", "label": "Building works nearby", "kind": "yes_no"},
    {"key": "major_road_50m", "label": "Major road within 50 m", "kind": "yes_no"},
    {"key": "under_flight_path", "label": "Under a flight path", "kind": "yes_no"},
    {
        "key": "dwelling_type",
        "label": "Dwelling type",
        "kind": "one_of",
        "options": ["flat", "terraced house", "semi-detached house", "detached house", "other"],
    },
    {
        "key": "occupants",
        "label": "Number of occupants",
        "kind": "whole_number",
        "min_value": 1,
        "max_value": 30,
    },
)

_KEY = re.compile(r"^[a-z][a-z0-9_]{0,59}$")
_YES = {"yes", "y", "true", "1"}
_NO = {"no", "n", "false", "0"}


class AttrSpec(Protocol):
    key: str
    label: str
    kind: str
    options: list[str]
    min_value: int | None
    max_value: int | None


# --- pure checks --------------------------------------------------------------------------------


def parse_value(spec: AttrSpec, raw: Any) -> Any:
    """The stored value for ``raw`` (bool, option text or int), None for "not answered".

    Raises ValueError with a sentence naming the attribute when the value does not fit.
    """
    if raw is None or (isinstance(raw, str) and raw.strip() == ""):
        return None
    if spec.kind == "yes_no":
        if isinstance(raw, bool):
            return raw
        text = str(raw).strip().lower()
        if text in _YES:
            return True
        if text in _NO:
            return False
        raise ValueError(f"{spec.label}: '{raw}' is not yes or no.")
    if spec.kind == "one_of":
        text = str(raw).strip()
        for option in spec.options:
            if option.lower() == text.lower():
                return option
        raise ValueError(f"{spec.label}: '{raw}' is not one of: {', '.join(spec.options)}.")
    if spec.kind == "whole_number":
        if isinstance(raw, bool):
            raise ValueError(f"{spec.label}: a whole number is needed, not yes or no.")
        if isinstance(raw, int):
            n = raw
        elif isinstance(raw, float) and raw.is_integer():
            n = int(raw)
        else:
            text = str(raw).strip()
            if not re.fullmatch(r"[+-]?\d{1,9}", text):
                raise ValueError(f"{spec.label}: '{raw}' is not a whole number.")
            n = int(text)
        if spec.min_value is not None and n < spec.min_value:
            raise ValueError(f"{spec.label}: {n} is below the smallest allowed value, {spec.min_value}.")
        if spec.max_value is not None and n > spec.max_value:
            raise ValueError(f"{spec.label}: {n} is above the largest allowed value, {spec.max_value}.")
        return n
    raise ValueError(f"{spec.label}: unknown attribute kind '{spec.kind}'.")


def validate_attributes(
    specs: Sequence[AttrSpec], raw: Mapping[str, Any]
) -> tuple[dict[str, Any], dict[str, str]]:
    """Clean values for every answered attribute, and a sentence per bad or unknown key."""
    by_key = {s.key: s for s in specs}
    clean: dict[str, Any] = {}
    errors: dict[str, str] = {}
    for key, value in raw.items():
        spec = by_key.get(key)
        if spec is None:
            errors[key] = f"'{key}' is not an attribute in this trial's catalogue."
            continue
        try:
            parsed = parse_value(spec, value)
        except ValueError as exc:
            errors[key] = str(exc)
            continue
        if parsed is not None:
            clean[key] = parsed
    return clean, errors


def format_value(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "no"
    return str(value)


# --- the stored catalogue -----------------------------------------------------------------------


def list_catalogue(session: Session, trial: Trial) -> list[AttributeDefinition]:
    return list(
        session.scalars(
            select(AttributeDefinition)
            .where(AttributeDefinition.trial_id == trial.id)
            .order_by(AttributeDefinition.position, AttributeDefinition.id)
        )
    )


def seed_default_catalogue(session: Session, trial: Trial) -> list[AttributeDefinition]:
    """Give a trial the default attributes it does not have yet (by key); return the catalogue."""
    have = {d.key for d in list_catalogue(session, trial)}
    for pos, item in enumerate(DEFAULT_CATALOGUE):
        if item["key"] in have:
            continue
        session.add(
            AttributeDefinition(
                trial_id=trial.id,
                key=item["key"],
                label=item["label"],
                kind=item["kind"],
                options=list(item.get("options", [])),
                min_value=item.get("min_value"),
                max_value=item.get("max_value"),
                position=pos,
            )
        )
    session.flush()
    return list_catalogue(session, trial)


def add_attribute(
    session: Session,
    trial: Trial,
    *,
    key: str,
    label: str,
    kind: str,
    options: Sequence[str] = (),
    min_value: int | None = None,
    max_value: int | None = None,
    actor: User | str = "cli",
) -> AttributeDefinition:
    key = key.strip().lower()
    label = label.strip()
    opts = [o.strip() for o in options if o.strip()]
    errors: dict[str, str] = {}
    if not _KEY.match(key):
        errors["key"] = "A key is lower-case letters, digits and '_', starting with a letter (at most 60)."
    if not label or len(label) > 200:
        errors["label"] = "Give a label of 1 to 200 characters."
    if kind not in KINDS:
        errors["kind"] = f"The kind is one of: {', '.join(KINDS)}."
    if kind == "one_of" and len(opts) < 2:
        errors["options"] = "A one-of attribute needs at least two options."
    if kind == "one_of" and len({o.lower() for o in opts}) != len(opts):
        errors["options"] = "The options must differ from one another."
    if kind != "whole_number" and (min_value is not None or max_value is not None):
        errors["min_value"] = "Bounds apply only to whole numbers."
    if min_value is not None and max_value is not None and min_value > max_value:
        errors["max_value"] = "The largest value cannot be below the smallest."
    if errors:
        raise ValidationFailed(next(iter(errors.values())), errors)
    if (
        session.scalar(
            select(AttributeDefinition.id).where(
                AttributeDefinition.trial_id == trial.id, AttributeDefinition.key == key
            )
        )
        is not None
    ):
        raise Conflict(f"Trial {trial.code} already has an attribute '{key}'.", code="attribute_exists")
    pos = (
        session.scalar(
            select(func.max(AttributeDefinition.position)).where(AttributeDefinition.trial_id == trial.id)
        )
        or 0
    ) + 1
    defn = AttributeDefinition(
        trial_id=trial.id,
        key=key,
        label=label,
        kind=kind,
        options=opts if kind == "one_of" else [],
        min_value=min_value,
        max_value=max_value,
        position=pos,
    )
    session.add(defn)
    session.flush()
    audit.record(
        session,
        actor,
        "attribute.add",
        "attribute_definition",
        defn.id,  # type: ignore[arg-type]
        {"trial": trial.code, "key": key, "kind": kind},
    )
    return defn
