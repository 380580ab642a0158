"""CLI commands of the quota: quota show."""

from __future__ import annotations

import argparse
import json

from server.cli_base import open_db
from server.db import session_scope
from server.quota import service as quota_service
from server.quota.schemas import quota_out
from server.settings import Settings
from server.trials import service as trials_service


def _factory(settings: Settings):  # type: ignore[no-untyped-def]
    return open_db(settings)


def cmd_quota_show(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(_factory(settings)) as s:
        trial = trials_service.trial_in_view(s, args.trial)
        qv = quota_service.quota_view(s, trial)
        r = qv.report
        if args.json:
            print(json.dumps(quota_out(qv).model_dump(mode="json")))
            return 0
        print(f"quota of {trial.code}: {r.counted} home(s) counted (states: {', '.join(r.counting_states)})")
        for st in r.targets:
            t = st.target
            bounds = (
                f"{t.min_count}..{t.max_count}"
                if t.min_count is not None and t.max_count is not None
                else f">= {t.min_count}"
                if t.min_count is not None
                else f"<= {t.max_count}"
            )
            extra = (
                f"short by {st.shortfall}"
                if st.status == "short"
                else f"{st.excess} over"
                if st.status == "over"
                else "met"
            )
            print(
                f"  {t.label}: {st.count} ({bounds}) {extra}"
                + (f" [{', '.join(st.homes)}]" if st.homes else "")
            )
        print("by state: " + ", ".join(f"{k} {v}" for k, v in sorted(r.by_state.items())))
        if r.suggestions:
            print(
                "recruit next: "
                + "; ".join(f"{sg.code} ({', '.join(qv.suggestion_labels(sg))})" for sg in r.suggestions)
            )
            print(f"  ({qv.rule})")
        for tid, gone in qv.departures.items():
            label = next(s.target.label for s in r.targets if s.target.id == tid)
            print(
                f"warning: '{label}' is below its minimum after "
                + ", ".join(f"{d.code} left on {d.at:%Y-%m-%d}" for d in gone)
            )
    return 0


def register(sub: argparse._SubParsersAction, storage: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add the `quota` command group to the top level ``sub`` (it has no `storage` command)."""
    q = sub.add_parser("quota", help="recruitment quota").add_subparsers(dest="quota_cmd", required=True)
    qs = q.add_parser("show", help="targets, counts, shortfalls and who to recruit next")
    qs.add_argument("--trial")
    qs.add_argument("--json", action="store_true")
    qs.set_defaults(func=cmd_quota_show)
