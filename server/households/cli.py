"""CLI commands of the households domain: home import/export, storage purge."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from server.cli_base import open_db
from server.db import session_scope
from server.devices.clipstore import ClipStore
from server.households import erasure, transfer
from server.settings import Settings
from server.trials import service as trials_service


def _factory(settings: Settings):  # type: ignore[no-untyped-def]
    return open_db(settings)


def cmd_home_import(args: argparse.Namespace, settings: Settings) -> int:
    path = Path(args.file)
    try:
        data = path.read_bytes()
    except OSError as exc:
        print(f"trialhouse: cannot read {path}: {exc.strerror}", file=sys.stderr)
        return 2
    with session_scope(_factory(settings)) as s:
        trial = trials_service.trial_in_view(s, args.trial)
        try:
            report = transfer.import_csv(s, trial, data, actor="cli")
        except transfer.ImportRejected as exc:
            print(f"nothing imported: {len(exc.report.problems)} problem(s) in {path.name}", file=sys.stderr)
            for p in exc.report.problems:
                print(f"  {p.sentence()}", file=sys.stderr)
            return 1
        print(f"{len(report.created)} home(s) imported into {trial.code}: {', '.join(report.created)}")
    return 0


def cmd_home_export(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(_factory(settings)) as s:
        trial = trials_service.trial_in_view(s, args.trial)
        text = transfer.export_csv(s, trial, with_personal_data=args.with_personal_data, actor="cli")
    if args.output:
        Path(args.output).write_text(text, encoding="utf-8")
        print(
            f"register of {trial.code} written to {args.output}"
            + (" (with personal data; recorded in the audit trail)" if args.with_personal_data else "")
        )
    else:
        sys.stdout.write(text)
    return 0


def cmd_storage_purge(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(_factory(settings)) as s:
        report = erasure.purge_clips(
            s, ClipStore(settings.clip_dir), apply=args.apply, actor="cli", cache_dir=settings.cache_dir
        )
    if args.json:
        print(
            json.dumps(
                {
                    "applied": report.applied,
                    "deleted": report.deleted,
                    "failed": list(report.failed),
                    "waiting_no_home": report.waiting_no_home,
                    "spools": list(report.spools),
                    "items": [
                        {
                            "clip_id": i.clip_id,
                            "reason": i.reason,
                            "homes": list(i.homes),
                            "received_at": i.received_at.isoformat(),
                        }
                        for i in report.items
                    ],
                }
            )
        )
    else:
        for i in report.items:
            print(
                f"{'removed' if report.applied else 'would remove'} clip {i.clip_id} ({i.reason}; "
                f"homes {', '.join(i.homes) or '-'}; last received {i.received_at:%Y-%m-%d})"
            )
        for key in report.spools:
            print(f"{'removed' if report.applied else 'would remove'} upload spool left by a crash: {key}")
        n = report.by_reason
        if report.applied:
            print(
                f"{report.deleted} clip file(s) removed ({n['retention']} past retention, {n['no_home']} "
                f"with no home past the trial's limit, {n['private']} flagged private)"
                + (f"; {len(report.failed)} could not be removed" if report.failed else "")
            )
        else:
            print(
                f"dry run: {len(report.items)} clip file(s) would be removed ({n['retention']} past "
                f"retention, {n['no_home']} with no home past the trial's limit, {n['private']} flagged "
                "private); run again with --apply to remove them"
            )
        if report.waiting_no_home:
            print(
                f"{report.waiting_no_home} clip(s) with no home kept until the trial's limit for such "
                "clips (unassigned_clip_retention_days) has passed"
            )
    return 1 if report.failed else 0


def register(sub: argparse._SubParsersAction, storage: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add this domain's commands: ``sub`` is the top level, ``storage`` the `storage` group."""
    home = sub.add_parser("home", help="the household register").add_subparsers(
        dest="home_cmd", required=True
    )
    hi = home.add_parser("import", help="import homes from CSV: every row or none")
    hi.add_argument("file")
    hi.add_argument("--trial", help="trial code (default: the latest trial)")
    hi.set_defaults(func=cmd_home_import)
    he = home.add_parser("export", help="export the register as CSV (codes only unless asked)")
    he.add_argument("--trial")
    he.add_argument(
        "--with-personal-data",
        action="store_true",
        help="include contact details (recorded in the audit trail)",
    )
    he.add_argument("-o", "--output", help="write to this file instead of standard output")
    he.set_defaults(func=cmd_home_export)

    sp = storage.add_parser(
        "purge",
        help="remove clips past their home's retention (or the trial's limit for clips with no home), "
        "clips flagged private and crashed upload spools (dry run unless --apply)",
    )
    sp.add_argument("--apply", action="store_true", help="remove the files (otherwise only list them)")
    sp.add_argument("--json", action="store_true")
    sp.set_defaults(func=cmd_storage_purge)
