"""The role matrix: which staff roles hold each capability. Every staff route names one.

Tests walk every route of the app and check it against this table, role by role.
"""

from __future__ import annotations

ADMIN, COORDINATOR, REVIEWER, LEAD = "admin", "coordinator", "reviewer", "lead"
ROLES = (ADMIN, COORDINATOR, REVIEWER, LEAD)
ALL = frozenset(ROLES)

CAPABILITIES: dict[str, frozenset[str]] = {
    "staff.self": ALL,  # own account, personal API tokens
    "trials.all": frozenset({ADMIN}),  # every trial, whatever the memberships
    "devices.view": frozenset({ADMIN, COORDINATOR, LEAD}),
    "devices.manage": frozenset({ADMIN, COORDINATOR}),  # register, revoke
    "alerts.view": frozenset({ADMIN, COORDINATOR, LEAD}),  # reviewers work from the desk, blind
    "clips.listen": frozenset({ADMIN, COORDINATOR, REVIEWER}),  # audio and its images
    "clips.private": frozenset({ADMIN}),  # clips flagged as private content
    "homes.view": frozenset({ADMIN, COORDINATOR, LEAD}),  # codes and attributes only
    "homes.manage": frozenset({ADMIN, COORDINATOR}),
    "personal.view": frozenset({ADMIN, COORDINATOR}),  # contact data; audited
    "personal.manage": frozenset({ADMIN, COORDINATOR}),  # edit contact data; audited
    "homes.erase": frozenset({ADMIN, COORDINATOR}),
    "quota.view": frozenset({ADMIN, COORDINATOR, LEAD}),
    "quota.manage": frozenset({ADMIN, COORDINATOR}),  # targets, counting states
    "attributes.manage": frozenset({ADMIN, COORDINATOR}),  # a trial's attribute catalogue
    "installations.manage": frozenset({ADMIN, COORDINATOR}),
    "staged.manage": frozenset({ADMIN, COORDINATOR}),
    "review.work": frozenset({ADMIN, REVIEWER}),
    "review.adjudicate": frozenset({ADMIN, REVIEWER}),  # reviewers also need is_adjudicator
    "review.adjudicate.always": frozenset({ADMIN}),  # without is_adjudicator
    "review.adjudicate.own": frozenset({ADMIN}),  # a clip one gave a verdict on
    "review.gold": frozenset({ADMIN, COORDINATOR}),
    "review.agreement": frozenset({ADMIN, LEAD}),
    "summary.view": frozenset({ADMIN, COORDINATOR, LEAD}),
    "users.manage": frozenset({ADMIN}),
    "audit.view": frozenset({ADMIN}),
}


def allowed(role: str, capability: str) -> bool:
    return role in CAPABILITIES[capability]
