"""Rendering the weekly summary: the template context, its charts, and the self-contained HTML file."""

from __future__ import annotations

import math
from typing import Any

from server.analytics import charts, compare, homerate, rates, shares, weekly, whatif

# Sentences for the stable reason codes the maths returns.
REASONS = {
    rates.NO_MONITORED_TIME: "no monitored time",
    rates.NO_EVENTS: "no false alarms",
    rates.NO_TRIALS: "no staged events",
    rates.TOO_FEW_HOMES: "fewer than two homes",
    homerate.TOO_FEW_HOMES: "too few homes to judge spread",
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
WHATIF_TAGS = {whatif.ACCEPTABLE: "good", whatif.ABOVE_TARGET: "bad"}


def _n(x: float, digits: int = 2) -> str:
    return "—" if x is None or math.isnan(x) else ("∞" if math.isinf(x) else f"{x:.{digits}f}")


def readiness_text(r: homerate.ReadinessVerdict) -> str:
    """One sentence for a readiness verdict (the rule itself is printed beside it)."""
    level = f"{100 * r.confidence_level:g}%"
    if r.state == "met":
        return (
            f"Met: the upper bound, {_n(r.high_all, 3)} false-alarm disturbances per home-month with every "
            f"open one counted as a false alarm, is at or below the target of {r.target:g}."
        )
    if r.state == "not_met":
        return (
            f"Not met: even the {level} lower limit, {_n(r.low_none, 3)}, with none of the open ones "
            f"counted, is above the target of {r.target:g}."
        )
    text = f"Not yet shown: {r.reason_text or ''}".strip()
    if r.more_home_months is not None and r.more_home_months > 0:
        text += (
            f" At the current rate about {r.more_home_months:,.0f} more home-months of monitoring would "
            f"bring the upper bound to the target of {r.target:g}."
        )
    return text


def open_range_text(r: homerate.ReadinessVerdict, open_alerts: int) -> str | None:
    """The range the open alerts leave, from none of them to all of them being false alarms."""
    if r.open_count == 0 and open_alerts == 0:
        return None
    lead = "Not yet shown: " if r.state == "not_yet_shown" else ""
    return (
        f"{lead}{open_alerts} alert{'' if open_alerts == 1 else 's'} await review or were marked "
        f"unsure ({r.open_count} disturbance{'' if r.open_count == 1 else 's'}). "
        f"Counting none of them as false alarms: {_n(r.estimate_none, 3)} per home-month "
        f"(upper bound {_n(r.high_none, 3)}); counting all of them: {_n(r.estimate_all, 3)} "
        f"(upper bound {_n(r.high_all, 3)})."
    )


def whatif_state_text(state: str, lost: int) -> str:
    if state == weekly.DETECTS_NOTHING:
        return "Detects none of the staged events: not acceptable whatever the false alarms."
    return whatif.state_text(state, lost)


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
        "open_range_text": open_range_text,
        "whatif_state_text": whatif_state_text,
        "whatif_tags": WHATIF_TAGS,
        "compare_reasons": compare.REASON_TEXT,
        "compare_min_homes": compare.MIN_HOMES,
        "homerate_reasons": homerate.REASON_TEXT,
        "min_homes": homerate.MIN_HOMES,
        "links": links,
        "csv_base": f"/api/v1/trials/{summary.trial_code}/summary/tables",
        "week_query": f"?week={summary.week.label}",
    }


def standalone_html(summary: weekly.WeeklySummary) -> str:
    """The summary as one HTML file: styles and charts inline, nothing fetched when it is opened."""
    from server.web.templating import make_templates

    env = make_templates().env
    return env.get_template("analytics/export.html").render(context(summary, links=False))
