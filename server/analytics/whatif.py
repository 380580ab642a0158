"""Threshold what-if: what raising the score threshold would do to false alarms and detection.

Devices send only alerts scoring at or above their own threshold, so a threshold can be raised
in simulation (drop the alerts below it) but never lowered. Pure functions; no database access.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from server.analytics import homerate, rates

# What a threshold would do, as one state per row (the page shows STATE_TEXT[state]).
ACCEPTABLE = "acceptable"
LOSES_DETECTIONS = "loses_detections"
NO_STAGED_EVENTS = "no_staged_events"
ABOVE_TARGET = "above_target"
TOO_FEW_HOMES = homerate.TOO_FEW_HOMES
STATE_TEXT = {
    ACCEPTABLE: "Acceptable: meets the target and keeps every staged detection.",
    LOSES_DETECTIONS: "Meets the target but loses {lost} staged detections.",
    NO_STAGED_EVENTS: "Meets the target, but there are no staged events to judge detection.",
    ABOVE_TARGET: "Not shown to meet the target.",
    TOO_FEW_HOMES: "Too few homes to judge spread.",
}


def score_floor(min_score_by_firmware: ArrayLike) -> float:
    """The lowest threshold that can be simulated for every device.

    A firmware never sends an alert scoring below its own threshold, so the lowest score seen from
    a firmware bounds that threshold from above; below the highest such bound some firmware would
    have sent alerts we never saw. NaN when there are no alerts.
    """
    m = np.asarray(min_score_by_firmware, dtype=np.float64)
    return float(m.max()) if m.size else math.nan


def threshold_grid(floor: float, *, step: float = 0.02, top: float = 1.0) -> NDArray[np.float64]:
    """Thresholds from `floor` up to `top` (both included) in steps of `step` above the floor."""
    if math.isnan(floor):
        return np.zeros(0)
    if step <= 0:
        raise ValueError("step must be positive")
    first = math.ceil(round(floor / step, 9)) * step
    grid = np.arange(first, top + step / 2, step)
    grid = np.round(grid, 9)
    return np.unique(np.concatenate([[floor], grid[(grid > floor) & (grid <= top)]]))


def at_thresholds(
    fa_scores: ArrayLike,
    home_months: float,
    event_best_scores: ArrayLike,
    thresholds: ArrayLike,
    *,
    floor: float,
    target: float,
    fa_counts: ArrayLike | None = None,
    confidence_level: float = 0.95,
    fa_homes: ArrayLike | None = None,
    home_months_by_home: ArrayLike | None = None,
    min_homes: int = homerate.MIN_HOMES,
) -> pd.DataFrame:
    """False alarms per home-month and staged detection at each threshold.

    Parameters
    ----------
    fa_scores: score of each false alarm (or of each group of equal scores, with `fa_counts`).
    home_months: monitored time (unchanged by the threshold).
    event_best_scores: per staged event, the highest score among the alerts that detected it
        (NaN for a missed event); an event stays detected at threshold t when this is >= t.
    thresholds: each at or above `floor` (ValueError otherwise: it cannot be simulated).
    target: false alarms per home-month; a threshold meets it under the one rule
        (`homerate.readiness_rule`): its upper limit `upper` is at or below the target.
    fa_homes, home_months_by_home: optional; the home (position in `home_months_by_home`) of each
        entry of `fa_scores`, and each home's monitored time. Given, `upper` is the home-level upper
        limit (`homerate.home_rate`); otherwise the exact (Garwood) upper limit, the same side and
        level, which assumes homes alike.

    Returns
    -------
    threshold, false_alarms, rate, low, high (exact Garwood interval), events, detected,
    detected_share, detected_low, detected_high (Wilson), miss_share, upper, meets_target,
    lost_detections (staged detections lost against the floor), state ("acceptable",
    "loses_detections", "no_staged_events", "above_target" or "too_few_homes"; see STATE_TEXT).
    A threshold is "acceptable" only when it meets the target and keeps every staged detection
    the floor has.
    """
    t = np.asarray(thresholds, dtype=np.float64)
    if np.any(t < floor - 1e-12):
        raise ValueError(f"thresholds below {floor:.3f} cannot be simulated: devices never sent those alerts")
    s = np.asarray(fa_scores, dtype=np.float64)
    w = np.ones_like(s) if fa_counts is None else np.asarray(fa_counts, dtype=np.float64)
    order = np.argsort(s, kind="mergesort")
    s, w = s[order], w[order]
    # Alerts at or above t: total weight from the first score >= t onwards.
    tail = np.concatenate([np.cumsum(w[::-1])[::-1], [0.0]])
    fa = tail[np.searchsorted(s, t, side="left")].astype(np.int64)
    r = rates.poisson_rate_arrays(fa, np.full(len(t), home_months), confidence_level=confidence_level)
    best = np.asarray(event_best_scores, dtype=np.float64)
    hit = np.sort(best[~np.isnan(best)])
    detected = (len(hit) - np.searchsorted(hit, t, side="left")).astype(np.int64)
    n = np.full(len(t), len(best), dtype=np.int64)
    lim = rates.proportion_limits(detected, n, confidence_level=confidence_level, method="wilson")
    share = np.divide(detected, n, out=np.full(len(t), np.nan), where=n > 0)
    at_floor = int(len(hit) - np.searchsorted(hit, floor, side="left"))
    lost = (at_floor - detected).astype(np.int64)
    upper = r.high
    too_few = np.zeros(len(t), dtype=bool)
    if fa_homes is not None or home_months_by_home is not None:
        if fa_homes is None or home_months_by_home is None:
            raise ValueError("fa_homes and home_months_by_home go together")
        hm = np.asarray(home_months_by_home, dtype=np.float64)
        where = np.asarray(fa_homes, dtype=np.intp)[order]
        if where.size and where.max() >= len(hm):
            raise ValueError("fa_homes must be positions in home_months_by_home")
        # `homerate.home_rate` at every threshold at once: the same homes (those with monitored
        # time) throughout, one row of per-home counts per threshold.
        monitored = hm > 0
        if monitored.sum() < max(min_homes, 2) or len(t) == 0:
            upper = np.full(len(t), np.nan)
            too_few[:] = True
        else:
            per_home = np.stack(
                [
                    np.bincount(where[s >= threshold], weights=w[s >= threshold], minlength=len(hm))
                    for threshold in t
                ]
            )
            upper = homerate.home_rate_limits(
                per_home[:, monitored],
                np.broadcast_to(hm[monitored], (len(t), int(monitored.sum()))),
                confidence_level=confidence_level,
            )[2]
    meets = upper <= target
    state = np.where(
        too_few,
        TOO_FEW_HOMES,
        np.where(
            ~meets,
            ABOVE_TARGET,
            np.where(n == 0, NO_STAGED_EVENTS, np.where(lost > 0, LOSES_DETECTIONS, ACCEPTABLE)),
        ),
    ).astype(object)
    return pd.DataFrame(
        {
            "threshold": t,
            "false_alarms": fa,
            "rate": r.estimate,
            "low": r.low,
            "high": r.high,
            "events": n,
            "detected": detected,
            "detected_share": share,
            "detected_low": lim.low,
            "detected_high": lim.high,
            "miss_share": 1.0 - share,
            "upper": upper,
            "meets_target": meets,
            "lost_detections": lost,
            "state": state,
        }
    )


def state_text(state: str, lost_detections: int) -> str:
    """One sentence for a what-if row's state."""
    return STATE_TEXT[state].format(lost=lost_detections)
