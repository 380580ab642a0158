"""The `trialhouse` command line: serve, db, user, trial, device, alert, storage, simulate, and the
domain commands."""

from __future__ import annotations

import argparse
import datetime as dt
import getpass
import json
import logging
import sys
from collections.abc import Sequence

from server import migrate, simulate
from server.admin import cli as admin_cli
from server.analytics import cli as analytics_cli
from server.auth import service as auth_service
from server.cli_base import CliError, open_db
from server.db import make_engine, session_scope
from server.demo import cli as demo_cli
from server.devices import service as devices_service
from server.devices import storage, views
from server.errors import AppError
from server.households import cli as households_cli
from server.quota import cli as quota_cli
from server.review import cli as review_cli
from server.roles import ROLES
from server.settings import Settings
from server.trials import service as trials_service

log = logging.getLogger("trialhouse")


def _print_json(obj: object) -> None:
    print(json.dumps(obj, indent=None, default=str))


# --- commands -------------------------------------------------------------------------------


def cmd_serve(args: argparse.Namespace, settings: Settings) -> int:
    import uvicorn

    # Here, not at the top: the whole web app (every router, matplotlib) would load for every command.
    from server.app import create_app

    open_db(settings)
    app = create_app(settings)
    print(f"Trialhouse listening on http://{args.host}:{args.port}/  (API docs at /docs)", flush=True)
    uvicorn.run(app, host=args.host, port=args.port, log_level=args.log_level, access_log=False)
    return 0


def cmd_db_upgrade(args: argparse.Namespace, settings: Settings) -> int:
    engine = make_engine(settings.resolved_database_url())
    before = migrate.current_revision(engine)
    migrate.upgrade(engine)
    after = migrate.current_revision(engine)
    print(f"database at revision {after}" + ("" if before == after else f" (was {before or 'empty'})"))
    return 0


def cmd_user_add(args: argparse.Namespace, settings: Settings) -> int:
    if sys.stdin.isatty():
        password = getpass.getpass("Password: ")
    else:
        password = sys.stdin.readline().rstrip("\r\n")
    factory = open_db(settings)
    with session_scope(factory) as s:
        user = auth_service.create_user(
            s,
            email=args.email,
            name=args.name or "",
            role=args.role,
            password=password,
            is_adjudicator=args.adjudicator,
        )
        print(f"user {user.email} added with role {user.role}")
    return 0


def cmd_trial_add(args: argparse.Namespace, settings: Settings) -> int:
    factory = open_db(settings)
    with session_scope(factory) as s:
        try:
            starts = dt.date.fromisoformat(args.starts_on) if args.starts_on else dt.date.today()
            ends = dt.date.fromisoformat(args.ends_on) if args.ends_on else None
        except ValueError as exc:
            raise CliError(f"Dates are YYYY-MM-DD: {exc}") from exc
        trial = trials_service.create_trial(
            s,
            code=args.code,
            name=args.name or args.code,
            starts_on=starts,
            ends_on=ends,
            sound_classes=[c.strip() for c in args.sound_classes.split(",") if c.strip()],
            fa_target_per_home_month=args.target,
            timezone=args.timezone,
            disturbance_window_s=args.disturbance_window,
        )
        print(f"trial {trial.code} added: {', '.join(trial.sound_classes)}")
    return 0


def cmd_trial_set(args: argparse.Namespace, settings: Settings) -> int:
    if args.target is None and args.disturbance_window is None:
        raise CliError("Give --target and/or --disturbance-window.")
    with session_scope(open_db(settings)) as s:
        trial = trials_service.get_trial(s, args.code)
        changes = trials_service.set_trial_settings(
            s, trial, fa_target_per_home_month=args.target, disturbance_window_s=args.disturbance_window
        )
        if not changes:
            print(f"trial {trial.code}: nothing changed")
        for name, (old, new) in changes.items():
            print(f"trial {trial.code}: {name} {old:g} -> {new:g}")
    return 0


def cmd_trial_list(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        for t in trials_service.list_trials(s):
            print(f"{t.code}\t{t.name}\t{t.starts_on}\t{','.join(t.sound_classes)}")
    return 0


def cmd_device_add(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        trial = (
            trials_service.get_trial(s, args.trial)
            if args.trial
            else trials_service.ensure_default_trial(
                s, settings.default_trial_code, settings.default_sound_classes
            )
        )
        device, token = devices_service.register_device(
            s, serial=args.serial, trial=trial, hardware_model=args.hardware_model
        )
        if args.json:
            _print_json(
                {
                    "serial": device.serial,
                    "token": token,
                    "trial": trial.code,
                    "hardware_model": device.hardware_model,
                }
            )
        else:
            print(f"device {device.serial} registered in trial {trial.code}")
            print(f"token (shown once; store it on the device): {token}")
    return 0


def cmd_device_list(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        rows = views.device_rows(s, settings)
        if args.json:
            _print_json([r.model_dump(mode="json") for r in rows])
        else:
            for r in rows:
                print(
                    f"{r.serial}\t{r.trial}\t{r.home or '-'}\t{r.last_seen_at or 'never'}"
                    f"\t{'revoked' if r.revoked else 'enrolled'}"
                )
    return 0


def cmd_device_revoke(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        d = devices_service.revoke_device(s, args.serial)
        print(f"device {d.serial} revoked")
    return 0


def cmd_alert_list(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        rows = views.alert_rows(s, devices_service.list_alerts(s, limit=args.limit))
        if args.json:
            _print_json([r.model_dump(mode="json") for r in rows])
        else:
            for r in rows:
                print(
                    f"{r.id}\t{r.device}\t{r.home or 'unassigned'}\t{r.sound_class}\t{r.score:.2f}"
                    f"\t{r.detected_at.isoformat()}\t{r.clip_sha256}"
                )
    return 0


def cmd_storage_check(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        return storage.run_check(s, settings, as_json=args.json, fix=args.repair)


def cmd_simulate(args: argparse.Namespace, settings: Settings) -> int:
    return simulate.main_from_args(args)


# --- parser ---------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="trialhouse", description="Run an in-home acoustic detector pilot.")
    p.add_argument("-v", "--verbose", action="store_true")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    sp = sub.add_parser("serve", help="serve the web app and the device API")
    sp.add_argument("--host", default="127.0.0.1")
    sp.add_argument("--port", type=int, default=8000)
    sp.add_argument("--log-level", default="info")
    sp.set_defaults(func=cmd_serve)

    db = sub.add_parser("db", help="database schema").add_subparsers(dest="db_cmd", required=True)
    db.add_parser("upgrade", help="migrate the database to the current schema").set_defaults(
        func=cmd_db_upgrade
    )

    user = sub.add_parser("user", help="staff accounts").add_subparsers(dest="user_cmd", required=True)
    ua = user.add_parser("add", help="add a staff account (password read from standard input)")
    ua.add_argument("--email", required=True)
    ua.add_argument("--role", required=True, choices=list(ROLES))
    ua.add_argument("--name")
    ua.add_argument("--adjudicator", action="store_true", help="may settle disagreeing verdicts")
    ua.set_defaults(func=cmd_user_add)
    admin_cli.register(user)

    trial = sub.add_parser("trial", help="trials").add_subparsers(dest="trial_cmd", required=True)
    ta = trial.add_parser("add", help="add a trial")
    ta.add_argument("--code", required=True)
    ta.add_argument("--name")
    ta.add_argument("--sound-classes", required=True, help="comma-separated, e.g. smoke_alarm,baby_cry")
    ta.add_argument("--starts-on")
    ta.add_argument("--ends-on")
    ta.add_argument("--target", type=float, default=1.0, help="false alarms per home-month (default 1.0)")
    ta.add_argument("--timezone", default="UTC")
    ta.add_argument(
        "--disturbance-window",
        type=float,
        default=60.0,
        metavar="SECONDS",
        help="alerts of one sound from one home this close together are one disturbance (default 60)",
    )
    ta.set_defaults(func=cmd_trial_add)
    tset = trial.add_parser("set", help="change a trial's target or disturbance window (audited)")
    tset.add_argument("code")
    tset.add_argument("--target", type=float, help="false alarms per home-month")
    tset.add_argument(
        "--disturbance-window",
        type=float,
        metavar="SECONDS",
        help="alerts of one sound from one home this close together are one disturbance",
    )
    tset.set_defaults(func=cmd_trial_set)
    trial.add_parser("list", help="list trials").set_defaults(func=cmd_trial_list)

    dev = sub.add_parser("device", help="devices").add_subparsers(dest="device_cmd", required=True)
    da = dev.add_parser("add", help="register a device and print its token once")
    da.add_argument("--serial", required=True)
    da.add_argument("--trial")
    da.add_argument("--hardware-model", default="unknown")
    da.add_argument("--json", action="store_true")
    da.set_defaults(func=cmd_device_add)
    dl = dev.add_parser("list", help="list devices")
    dl.add_argument("--json", action="store_true")
    dl.set_defaults(func=cmd_device_list)
    dr = dev.add_parser("revoke", help="revoke a device's token")
    dr.add_argument("--serial", required=True)
    dr.set_defaults(func=cmd_device_revoke)

    al = sub.add_parser("alert", help="alerts").add_subparsers(dest="alert_cmd", required=True)
    all_ = al.add_parser("list", help="list stored alerts with their clip's SHA-256")
    all_.add_argument("--json", action="store_true")
    all_.add_argument("--limit", type=int, default=1_000_000)
    all_.set_defaults(func=cmd_alert_list)

    st = sub.add_parser("storage", help="the clip store")
    st_sub = st.add_subparsers(dest="storage_cmd", required=True)
    sc = st_sub.add_parser(
        "check",
        help="list orphan files, rows whose file is missing, and upload spools "
        "left by a crash (exit 1 if any)",
    )
    sc.add_argument("--json", action="store_true")
    sc.add_argument(
        "--repair", action="store_true", help="list, then remove orphan files and stale upload spools"
    )
    sc.set_defaults(func=cmd_storage_check)

    simulate.add_arguments(sub.add_parser("simulate", help="act as a device over the HTTP API"))
    sub.choices["simulate"].set_defaults(func=cmd_simulate)

    for module in (households_cli, quota_cli, review_cli, analytics_cli, demo_cli):
        module.register(sub, st_sub)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.WARNING, format="%(levelname)s %(name)s: %(message)s"
    )
    settings = Settings()
    try:
        return int(args.func(args, settings) or 0)
    except (AppError, CliError) as exc:
        msg = exc.message if isinstance(exc, AppError) else str(exc)
        print(f"trialhouse: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
