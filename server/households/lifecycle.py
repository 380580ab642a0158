"""The home lifecycle: which state may follow which, and the gates on the way.

Pure rules over plain values; no database access. The service applies them and records each change.
"""

from __future__ import annotations

from dataclasses import dataclass

from server.households.models import HomeState as S

# From each state, the states it may move to. Withdrawal is final; a household that declined
# may be approached again (back to candidate).
NEXT: dict[str, tuple[str, ...]] = {
    S.candidate: (S.screened, S.declined),
    S.screened: (S.consented, S.declined),
    S.consented: (S.installed, S.withdrawn),
    S.installed: (S.active, S.paused, S.withdrawn),
    S.active: (S.paused, S.withdrawn),
    S.paused: (S.active, S.installed, S.withdrawn),
    S.declined: (S.candidate,),
    S.withdrawn: (),
}

# Entering these states needs a consent on record.
NEEDS_CONSENT = frozenset({S.consented, S.installed, S.active})
# Entering these states needs a device installed in the home at that moment.
NEEDS_DEVICE = frozenset({S.installed, S.active})
# States in which devices may be installed in the home.
MAY_INSTALL = frozenset({S.consented, S.installed, S.active, S.paused})
# States in which a home is part of the pilot (installations are closed on leaving them).
ENDED = frozenset({S.withdrawn, S.declined})


@dataclass(frozen=True)
class Refusal:
    """Why a transition is refused: a stable code and one sentence a coordinator can act on."""

    code: str
    message: str


def _names(states: tuple[str, ...]) -> str:
    return ", ".join(states) if states else "nothing (this state is final)"


def check(code: str, current: str, target: str, *, has_consent: bool, has_device: bool) -> Refusal | None:
    """None when ``current -> target`` is allowed for home ``code``, else the reason it is not."""
    if target not in NEXT:
        return Refusal(
            "illegal_transition", f"'{target}' is not a home state; the states are {', '.join(NEXT)}."
        )
    if target == current:
        return Refusal("illegal_transition", f"{code} is already {current}.")
    allowed = NEXT.get(current, ())
    if target not in allowed:
        if current == S.withdrawn:
            return Refusal(
                "illegal_transition",
                f"{code} is withdrawn; withdrawal is final, so it cannot become {target}.",
            )
        return Refusal(
            "illegal_transition",
            f"{code} cannot go from {current} to {target}; from {current} it can go to: {_names(allowed)}.",
        )
    if target in NEEDS_CONSENT and not has_consent:
        return Refusal(
            "consent_missing",
            f"{code} has no consent on record; record the household's signed "
            f"consent before it becomes {target}.",
        )
    if target in NEEDS_DEVICE and not has_device:
        return Refusal(
            "no_device_installed",
            f"{code} has no device installed at that time; install one before it becomes {target}.",
        )
    return None
