"""CLI commands of the review domain: the backlog and agreement figures."""

from __future__ import annotations

import argparse
import json
import math

from server.cli_base import open_db
from server.db import session_scope
from server.review import overview
from server.settings import Settings
from server.trials import service as trials_service


def _fmt(x: float | None, digits: int = 3) -> str:
    return "—" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.{digits}f}"


def cmd_review_overview(args: argparse.Namespace, settings: Settings) -> int:
    with session_scope(open_db(settings)) as s:
        trial_id = trials_service.get_trial(s, args.trial).id if args.trial else None
        ov = overview.review_overview(s, trial_id)
    if args.json:
        print(json.dumps(overview.overview_to_json(ov), indent=2))
        return 0
    b = ov.backlog
    oldest = "—" if math.isnan(b.oldest_age_s) else f"{b.oldest_age_s / 3600:.1f} h"
    print(f"backlog: {b.count} alert(s) without a final verdict; oldest waited {oldest}")
    print("  " + ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in ov.by_state.items() if k != "final"))
    k = ov.kappa_overall
    interval = "" if math.isnan(k.low) else f" ({k.confidence_level:.0%} CI {_fmt(k.low)} to {_fmt(k.high)})"
    print(f"agreement sample: {ov.kappa_sample}")
    print(f"  {ov.why_random}")
    print(
        f"  double-reviewed at random: {ov.double_reviewed}; "
        f"agreement {_fmt(ov.percent_agreement.estimate)}, "
        f"Cohen's kappa {_fmt(k.estimate)}{interval}, Krippendorff's alpha {_fmt(ov.alpha.estimate)}"
    )
    print(
        f"  for comparison, all {ov.pooled_double_reviewed} double-reviewed clips including those sent on "
        f"as unsure: kappa {_fmt(ov.kappa_pooled.estimate)}"
    )
    for p in ov.pair_kappas:
        print(f"  {p.reviewer_a} / {p.reviewer_b}: {p.shared} shared, kappa {_fmt(p.kappa.estimate)}")
    u = ov.unsure_resolution
    print(
        f"unsure first verdicts: {u.first_unsure} ({u.drawn} also drawn at random); "
        f"{u.awaiting_second} waiting for a second verdict, {u.awaiting_adjudication} for adjudication"
    )
    said = ", ".join(f"{lab} {n}" for lab, n in u.second_said.items() if n)
    settled = ", ".join(f"{lab} {n}" for lab, n in u.settled.items() if n)
    print(f"  second reviewer said: {said or 'nothing yet'}")
    print(f"  adjudication settled: {settled or 'nothing yet'}")
    for name, f in (("gold checks", ov.fleiss.gold), ("adjudicated clips", ov.fleiss.adjudication)):
        why = f" ({f.reason})" if f.reason else ""
        print(f"Fleiss' kappa, {name}: {_fmt(f.estimate)} over {f.subjects} clip(s){why}")
    for r in ov.reviewers:
        gold = f"gold {r.gold.successes}/{r.gold.n}" if r.gold else "no gold answers"
        rate = _fmt(r.throughput.clips_per_hour, 0) if r.throughput else "—"
        print(f"  {r.name}: {r.verdicts} verdict(s), {gold}, {rate} clips/h")
    return 0


def register(
    sub: argparse._SubParsersAction[argparse.ArgumentParser],
    storage: argparse._SubParsersAction[argparse.ArgumentParser],
) -> None:
    """Add this domain's commands: ``sub`` is the top level, ``storage`` the `storage` group."""
    review = sub.add_parser("review", help="clip review").add_subparsers(dest="review_cmd", required=True)
    ro = review.add_parser("overview", help="backlog, reviewer agreement and reviewer quality")
    ro.add_argument("--trial", help="trial code (default: all trials)")
    ro.add_argument("--json", action="store_true")
    ro.set_defaults(func=cmd_review_overview)
