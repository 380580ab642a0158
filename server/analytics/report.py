"""Rendering the weekly summary: the template context, its charts, and the self-contained HTML file."""

from __future__ import annotations

import math
from typing import Any

from server.analytics import charts, rates, shares, weekly

# Sentences for the stable reason codes the maths returns.
REASONS = {
    rates.NO_MONITORED_TIME: "no monitored time",
    rates.NO_EVENTS: "no false alarms",
    rates.NO_TRIALS: "no staged events",
    rates.TOO_FEW_HOMES: "fewer than two homes",
    rates.RATE_NOT_BELOW_TARGET: "the rate is not below the target",
    shares.NO_FALSE_ALARMS: "no false alarms",
    "fewer_than_two_groups": "fewer than two groups",
}
OUTSIDE_REASONS = {
    "unassigned": "device not installed in any home (unassigned)",
    "not_monitored": "home not in a monitored state, or outside the installation dates",
    "offline": "device not listening (offline or muted)",
}
READINESS_LABELS = {"met": "Met", "not_met": "Not met", "not_yet_shown": "Not yet shown"}


def _n(x: float, digits: int = 2) -> str:
    return "—" if x is None or math.isnan(x) else ("∞" if math.isinf(x) else f"{x:.{digits}f}")


def readiness_text(r: rates.Readiness) -> str:
    """One sentence for a readiness figure."""
    level = f"{100 * r.confidence_level:g}%"
    if r.state == "met":
        return (
            f"Met: the {level} upper limit, {_n(r.high, 3)} false alarms per home-month, is at or below the "
            f"target of {r.target:g}."
        )
    if r.state == "not_met":
        return f"Not met: even the {level} lower limit, {_n(r.low, 3)}, is above the target of {r.target:g}."
    if r.reason == rates.HOMES_DIFFER:
        return (
            f"Not yet shown: the exact {level} upper limit, {_n(r.high, 3)}, meets the target of "
            f"{r.target:g}, but the home bootstrap's, {_n(r.home_bootstrap_high or math.nan, 3)}, does not. "
            "Homes are not alike, so the figure needs more homes, not only more months."
        )
    if r.reason == rates.NO_MONITORED_TIME:
        return "Not yet shown: there is no monitored time."
    if r.more_home_months is None:
        return (
            f"Not yet shown, and more time at the current rate ({_n(r.estimate, 3)}) would not show it: "
            f"the rate is not below the target of {r.target:g}."
        )
    return (
        f"Not yet shown: the {level} upper limit is {_n(r.high, 3)}. At the current rate about "
        f"{r.more_home_months:,.0f} more home-months of monitoring would bring it to the target "
        f"of {r.target:g}."
    )


def class_charts(cs: weekly.ClassSummary, target: float) -> dict[str, charts.Chart]:
    return {
        "trend": charts.trend_chart(cs.trend, target),
        "week-pareto": charts.pareto_chart(cs.week.homes),
        "to_date-pareto": charts.pareto_chart(cs.to_date.homes),
        "week-tradeoff": charts.tradeoff_chart(cs.week.whatif, target),
        "to_date-tradeoff": charts.tradeoff_chart(cs.to_date.whatif, target),
    }


def context(summary: weekly.WeeklySummary, *, links: bool) -> dict[str, Any]:
    """Everything `analytics/_summary.html` reads. `links`: CSV links (the page, not the mailed file)."""
    return {
        "s": summary,
        "charts": {cs.sound_class: class_charts(cs, summary.target) for cs in summary.classes},
        "reasons": REASONS,
        "outside_reasons": OUTSIDE_REASONS,
        "readiness_labels": READINESS_LABELS,
        "readiness_text": readiness_text,
        "links": links,
        "csv_base": f"/api/v1/trials/{summary.trial_code}/summary/tables",
        "week_query": f"?week={summary.week.label}",
    }


def standalone_html(summary: weekly.WeeklySummary) -> str:
    """The summary as one HTML file: styles and charts inline, nothing fetched when it is opened."""
    from server.web.templating import make_templates

    env = make_templates().env
    return env.get_template("analytics/export.html").render(context(summary, links=False))
