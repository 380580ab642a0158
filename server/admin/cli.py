"""`trialhouse user list | deactivate | reactivate | access | reset-password | trials` (``user add`` is in
server/cli.py). Changes are audited with the actor ``cli``; one active admin must remain here too."""

from __future__ import annotations

import argparse
import json

from server.admin import service
from server.cli_base import open_db
from server.db import session_scope
from server.roles import ROLES
from server.settings import Settings


def _open(settings: Settings):  # type: ignore[no-untyped-def]
    return session_scope(open_db(settings))


def cmd_list(args: argparse.Namespace, settings: Settings) -> int:
    with _open(settings) as s:
        users = service.list_users(s)
        if args.json:
            print(
                json.dumps(
                    [
                        {
                            "id": u.id,
                            "email": u.email,
                            "name": u.name,
                            "role": u.role,
                            "is_adjudicator": u.is_adjudicator,
                            "active": u.active,
                            "last_login_at": u.last_login_at.isoformat() if u.last_login_at else None,
                        }
                        for u in users
                    ]
                )
            )
        else:
            for u in users:
                print(
                    f"{u.email}\t{u.role}{'+adjudicator' if u.is_adjudicator else ''}"
                    f"\t{'active' if u.active else 'deactivated'}\t{u.name}"
                )
    return 0


def cmd_deactivate(args: argparse.Namespace, settings: Settings) -> int:
    with _open(settings) as s:
        change = service.deactivate(s, actor="cli", user_id=service.get_user_by_email(s, args.email).id)
        print(
            f"user {change.user.email} deactivated; {change.sessions_ended} session(s) ended"
            if change.changed
            else f"user {change.user.email} was already deactivated"
        )
    return 0


def cmd_reactivate(args: argparse.Namespace, settings: Settings) -> int:
    with _open(settings) as s:
        change = service.reactivate(s, actor="cli", user_id=service.get_user_by_email(s, args.email).id)
        print(
            f"user {change.user.email} reactivated"
            if change.changed
            else f"user {change.user.email} was already active"
        )
    return 0


def cmd_access(args: argparse.Namespace, settings: Settings) -> int:
    with _open(settings) as s:
        change = service.change_access(
            s,
            actor="cli",
            user_id=service.get_user_by_email(s, args.email).id,
            role=args.role,
            is_adjudicator=args.adjudicator,
        )
        u = change.user
        state = f"{u.role}{' with' if u.is_adjudicator else ' without'} the adjudicator permission"
        print(
            f"user {u.email} is now {state}; {change.sessions_ended} session(s) ended"
            if change.changed
            else f"user {u.email} already was {state}"
        )
    return 0


def cmd_reset_password(args: argparse.Namespace, settings: Settings) -> int:
    with _open(settings) as s:
        user, password = service.reset_password(
            s, actor="cli", user_id=service.get_user_by_email(s, args.email).id
        )
        print(f"temporary password for {user.email} (shown once; it must be changed at the next sign-in):")
        print(password)
    return 0


def cmd_trials(args: argparse.Namespace, settings: Settings) -> int:
    codes = [c.strip() for c in args.trials.split(",") if c.strip()]
    with _open(settings) as s:
        held = service.set_trials(
            s, actor="cli", user_id=service.get_user_by_email(s, args.email).id, trial_codes=codes
        )
        print(
            f"user {args.email} works on {', '.join(held)}" if held else f"user {args.email} sees every trial"
        )
    return 0


def register(user: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add the account sub-commands to ``trialhouse user``."""
    ul = user.add_parser("list", help="list staff accounts")
    ul.add_argument("--json", action="store_true")
    ul.set_defaults(func=cmd_list)
    ud = user.add_parser("deactivate", help="stop an account signing in; ends its sessions")
    ud.add_argument("--email", required=True)
    ud.set_defaults(func=cmd_deactivate)
    ur = user.add_parser("reactivate", help="let a deactivated account sign in again")
    ur.add_argument("--email", required=True)
    ur.set_defaults(func=cmd_reactivate)
    uc = user.add_parser(
        "access", help="change an account's role or adjudicator permission; ends its sessions"
    )
    uc.add_argument("--email", required=True)
    uc.add_argument("--role", choices=list(ROLES))
    adj = uc.add_mutually_exclusive_group()
    adj.add_argument(
        "--adjudicator",
        dest="adjudicator",
        action="store_const",
        const=True,
        help="may settle disagreeing verdicts",
    )
    adj.add_argument("--no-adjudicator", dest="adjudicator", action="store_const", const=False)
    uc.set_defaults(func=cmd_access, adjudicator=None)
    up = user.add_parser(
        "reset-password", help="print a temporary password that must be changed at the next sign-in"
    )
    up.add_argument("--email", required=True)
    up.set_defaults(func=cmd_reset_password)
    ut = user.add_parser("trials", help="limit an account to some trials (admins always see all)")
    ut.add_argument("--email", required=True)
    ut.add_argument(
        "--trials",
        required=True,
        help="comma-separated trial codes, e.g. PILOT-1,PILOT-2; '' for every trial",
    )
    ut.set_defaults(func=cmd_trials)
