"""CLI commands of the analytics domain: `trialhouse report weekly`."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from server.cli_base import open_db
from server.db import utcnow
from server.settings import Settings


def cmd_report_weekly(args: argparse.Namespace, settings: Settings) -> int:
    from server.analytics import report, weekly

    factory = open_db(settings)
    with factory() as session:
        summary = weekly.build_summary(session, trial_code=args.trial, week=args.week, now=utcnow())
    out = Path(args.out)
    if args.format == "json":
        out.write_text(json.dumps(weekly.summary_json(summary), indent=1), encoding="utf-8")
    else:
        out.write_text(report.standalone_html(summary), encoding="utf-8")
    print(f"wrote {out} ({summary.trial_code}, {summary.week.label})")
    return 0


def register(sub: argparse._SubParsersAction, storage: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add this domain's commands: ``sub`` is the top level, ``storage`` the `storage` group."""
    rep = sub.add_parser("report", help="reports for product leads").add_subparsers(
        dest="report_cmd", required=True
    )
    wk = rep.add_parser("weekly", help="the weekly trial summary as a self-contained HTML file (or JSON)")
    wk.add_argument("--trial", required=True, help="trial code")
    wk.add_argument("--week", help="ISO week such as 2026-W48 (default: the last complete week)")
    wk.add_argument("--out", required=True, help="file to write")
    wk.add_argument("--format", choices=("html", "json"), default="html")
    wk.set_defaults(func=cmd_report_weekly)
