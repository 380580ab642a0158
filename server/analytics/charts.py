"""The summary's charts, drawn on the server as inline SVG, each with a caption saying what it shows.

Matplotlib's object API (no pyplot, no global figure state, no GUI backend); pure functions of
the summary's tables.
"""

from __future__ import annotations

import io
import math
import re
from dataclasses import dataclass
from typing import Any

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter
from scipy import stats

INK = "#1d2630"
MUTED = "#8a96a3"
BARS = "#2f5d50"
LINE = "#b5651d"
TARGET = "#a33a2b"
SOFT = "#c9d8d2"
MISS_TICKS = (0.001, 0.01, 0.05, 0.1, 0.2, 0.5, 0.8, 0.95)

_RC: Any = {
    "svg.fonttype": "none",
    "svg.hashsalt": "trialhouse",
    "font.size": 9,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "xtick.color": INK,
    "ytick.color": INK,
    "font.family": "sans-serif",
}


@dataclass(frozen=True)
class Chart:
    title: str
    caption: str
    svg: str


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg")
    text = buf.getvalue()
    # Inline use: drop the XML prolog and DOCTYPE, and let the figure scale to its container.
    text = text[text.index("<svg") :]
    text = re.sub(r"<metadata>.*?</metadata>", "", text, count=1, flags=re.S)
    text = re.sub(r'<svg([^>]*?) width="[^"]*" height="[^"]*"', r'<svg\1 width="100%"', text, count=1)
    return text.replace("<svg", '<svg role="img" class="chart"', 1)


def _figure(width: float = 7.0, height: float = 3.2) -> Figure:
    return Figure(figsize=(width, height), layout="constrained")


def _empty(title: str, message: str, caption: str) -> Chart:
    with matplotlib.rc_context(_RC):
        fig = _figure(height=1.2)
        ax = fig.add_subplot()
        ax.axis("off")
        ax.text(0.5, 0.5, message, ha="center", va="center", color=MUTED, transform=ax.transAxes)
        return Chart(title, caption, _svg(fig))


def pareto_chart(homes: pd.DataFrame, *, top: int = 25) -> Chart:
    """Bars: false-alarm disturbances of the homes with most; line: cumulative share of them all."""
    title = "False-alarm disturbances by home"
    shown = homes[homes["disturbances"] > 0].head(top)
    caption = (
        f"Bars: false-alarm disturbances of the {len(shown)} home{'s' if len(shown) != 1 else ''} with "
        "the most, highest first. Line: running share of all false-alarm disturbances that these homes "
        "account for."
    )
    if shown.empty:
        return _empty(title, "No false alarms in this period", "No home had a false alarm in this period.")
    with matplotlib.rc_context(_RC):
        fig = _figure()
        ax = fig.add_subplot()
        x = np.arange(len(shown))
        ax.bar(x, shown["disturbances"], color=BARS, width=0.75)
        ax.set_xticks(x, shown["home_code"], rotation=60, ha="right", fontsize=7)
        ax.set_ylabel("disturbances")
        ax.spines[["top"]].set_visible(False)
        ax2 = ax.twinx()
        ax2.plot(x, shown["cumulative_share"], color=LINE, marker="o", markersize=3, linewidth=1.5)
        ax2.set_ylim(0, 1.02)
        ax2.yaxis.set_major_formatter(PercentFormatter(1.0))
        ax2.set_ylabel("cumulative share", color=LINE)
        ax2.spines[["top"]].set_visible(False)
        return Chart(title, caption, _svg(fig))


def tradeoff_chart(table: pd.DataFrame, target: float) -> Chart:
    """Miss rate (normal-deviate axis) against false alarms per home-month (log axis), per threshold."""
    title = "What a higher threshold would buy"
    caption = (
        "Each point is one score threshold, from the lowest every device already applies (left) "
        "upward. Across: false alarms per home-month (log scale); up: share of staged test events "
        "missed, on a normal-deviate scale. Filled points: the exact upper limit meets the target "
        f"({target:g} per home-month, dashed line)."
    )
    if table.empty or int(table["events"].iloc[0]) == 0:
        return _empty(
            title,
            "No staged test events in this period",
            "The trade-off needs staged test events; none fall in this period.",
        )
    n = int(table["events"].iloc[0])
    # The normal-deviate axis has no place for 0% or 100%; such points sit half an event inside.
    miss = table["miss_share"].clip(0.5 / n, 1 - 0.5 / n).to_numpy(dtype=float)
    rate = table["rate"].to_numpy(dtype=float)
    positive = rate[rate > 0]
    floor = positive.min() / 2 if positive.size else target / 100
    clipped = bool((rate <= 0).any())
    rate = np.where(rate > 0, rate, floor)
    meets = table["meets_target"].to_numpy(dtype=bool)
    with matplotlib.rc_context(_RC):
        fig = _figure(height=3.4)
        ax = fig.add_subplot()
        y = stats.norm.ppf(miss)
        ax.plot(rate, y, color=MUTED, linewidth=1)
        ax.scatter(rate[meets], y[meets], color=BARS, s=22, zorder=3, label="meets target")
        ax.scatter(
            rate[~meets],
            y[~meets],
            facecolors="white",
            edgecolors=BARS,
            s=22,
            zorder=3,
            label="does not meet target",
        )
        for i in (0, len(rate) - 1):
            ax.annotate(
                f"{table['threshold'].iloc[i]:.2f}",
                (rate[i], y[i]),
                textcoords="offset points",
                xytext=(4, 4),
                fontsize=7,
                color=INK,
            )
        ax.axvline(target, color=TARGET, linestyle="--", linewidth=1)
        ax.set_xscale("log")
        ticks = [p for p in MISS_TICKS if y.min() - 0.5 <= stats.norm.ppf(p) <= y.max() + 0.5] or [0.5]
        ax.set_yticks(stats.norm.ppf(ticks), [f"{100 * p:g}%" for p in ticks])
        ax.set_xlabel("false alarms per home-month" + (" (0 drawn at the left edge)" if clipped else ""))
        ax.set_ylabel("staged events missed")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.legend(frameon=False, fontsize=7, loc="best")
        ax.spines[["top", "right"]].set_visible(False)
        return Chart(title, caption, _svg(fig))


def trend_chart(trend: pd.DataFrame, target: float) -> Chart:
    """Weekly rate with its exact interval, the target line, and monitored home-months per week."""
    title = "False-alarm disturbances per home-month, week by week"
    caption = (
        "Points: each ISO week's false-alarm disturbances per home-month (a home's alerts on one sound "
        "counted once) with the exact 95% interval (bars). "
        f"Dashed line: the target ({target:g}). Shaded columns: monitored home-months that week "
        "(right axis); weeks without monitored time have no point."
    )
    if trend.empty:
        return _empty(title, "No weeks yet", "The trial has no complete week yet.")
    with matplotlib.rc_context(_RC):
        fig = _figure()
        ax = fig.add_subplot()
        x = np.arange(len(trend))
        ax2 = ax.twinx()
        ax2.bar(x, trend["home_months"], color=SOFT, width=0.8, zorder=0)
        ax2.set_ylabel("home-months", color=MUTED)
        ax.set_zorder(ax2.get_zorder() + 1)
        ax.patch.set_visible(False)
        ok = trend["rate"].notna().to_numpy()
        r = trend["rate"].to_numpy(dtype=float)
        err = np.vstack([r - trend["low"].to_numpy(dtype=float), trend["high"].to_numpy(dtype=float) - r])
        ax.errorbar(
            x[ok],
            r[ok],
            yerr=err[:, ok],
            fmt="o",
            color=BARS,
            ecolor=BARS,
            markersize=3.5,
            capsize=2,
            linewidth=1,
        )
        ax.axhline(target, color=TARGET, linestyle="--", linewidth=1)
        step = max(1, math.ceil(len(trend) / 14))
        ax.set_xticks(x[::step], trend["week"].iloc[::step], rotation=45, ha="right", fontsize=7)
        ax.set_ylabel("disturbances per home-month")
        ax.set_ylim(bottom=0)
        for a in (ax, ax2):
            a.spines[["top"]].set_visible(False)
        return Chart(title, caption, _svg(fig))
