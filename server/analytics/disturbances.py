"""Disturbances: the alerts one home heard from one sound, counted once.

When two devices of a home alert on the same sound the household is disturbed once. Alerts of
one sound class from one home are grouped by a window (the trial's `disturbance_window_s`): an
alert joins the disturbance begun by an earlier alert when it comes at most the window after
that disturbance's FIRST alert; otherwise it begins a new disturbance. Disturbances do not
chain, so one lasts at most the window, and a device that keeps alerting for ten minutes makes
about one disturbance per window, not one in all. Pure functions; no database access.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

DEFAULT_WINDOW_S = 60.0

# A disturbance's outcome from its alerts' outcomes, first match wins: confirmed if any alert
# was confirmed (the household really heard the sound), else false alarm if any was one, else
# awaiting review if any still waits, else unsure if any was judged unsure, else unusable.
PRECEDENCE = ("confirmed", "false_alarm", "pending", "unsure", "unusable")
# Outcomes that may still turn out to be false alarms ("open").
OPEN = ("pending", "unsure")


def group(home_id: ArrayLike, sound_class: ArrayLike, t: ArrayLike, *, window_s: float) -> NDArray[np.int64]:
    """The disturbance number (0..n-1) of each alert, by the rule in the module docstring.

    Parameters
    ----------
    home_id, sound_class: the alert's home and class (any comparable values).
    t: detection time, epoch seconds (clock skew corrected).
    window_s: the grouping window in seconds (>= 0; 0 groups only alerts at the same instant).

    Returns
    -------
    One int per alert, in the input's order; numbers rise with (home, class, first alert time).
    """
    return _grouped(home_id, sound_class, t, window_s=window_s)[0]


def _grouped(
    home_id: ArrayLike, sound_class: ArrayLike, t: ArrayLike, *, window_s: float
) -> tuple[NDArray[np.int64], NDArray[np.intp], NDArray[np.bool_]]:
    """`group`'s numbers, with the order it walked the alerts in (home, class, time; ties by row)
    and which alert of that order begins each disturbance."""
    if window_s < 0:
        raise ValueError("the disturbance window cannot be negative")
    h = pd.factorize(np.asarray(home_id), sort=True)[0]
    c, classes = pd.factorize(np.asarray(sound_class, dtype=object), sort=True)
    times = np.asarray(t, dtype=np.float64)
    n = len(times)
    out = np.zeros(n, dtype=np.int64)
    if n == 0:
        return out, np.zeros(0, dtype=np.intp), np.zeros(0, dtype=bool)
    # One key for (home, class): the same order as sorting by home, then class, then time.
    order = np.lexsort((times, h.astype(np.int64) * max(len(classes), 1) + c))
    hs, cs, ts = h[order], c[order], times[order]
    same = np.r_[False, (hs[1:] == hs[:-1]) & (cs[1:] == cs[:-1])]
    close = same & (np.r_[np.inf, np.diff(ts)] <= window_s)
    starts = ~close  # certainly a new disturbance: no earlier alert of the group within the window
    # Within a run of close alerts the first-alert anchor has to be followed one alert at a time;
    # such runs are short in practice (alerts seconds apart from a home's devices).
    run_start = np.flatnonzero(starts)
    run_end = np.r_[run_start[1:], n]
    for a, b in zip(run_start[(run_end - run_start) > 1], run_end[(run_end - run_start) > 1], strict=True):
        anchor = ts[a]
        for j in range(a + 1, b):
            if ts[j] - anchor > window_s:
                starts[j] = True
                anchor = ts[j]
    out[order] = np.cumsum(starts) - 1
    return out, order, starts


def summarise(alerts: pd.DataFrame, *, window_s: float) -> pd.DataFrame:
    """One row per disturbance from the alerts of a pilot.

    Parameters
    ----------
    alerts: home_id, sound_class, t (epoch s), outcome (one of PRECEDENCE), plus any columns
        to carry from each disturbance's first alert (for example period, week_index).

    Returns
    -------
    The carried columns of the first alert, home_id, sound_class, t (first alert), alerts (count),
    outcome (by PRECEDENCE), one row per disturbance ordered by its number.
    """
    if alerts.empty:
        return alerts.iloc[:0].assign(alerts=pd.Series(dtype=np.int64))
    number, order, starts = _grouped(alerts["home_id"], alerts["sound_class"], alerts["t"], window_s=window_s)
    rank = pd.Index(PRECEDENCE).get_indexer(alerts["outcome"]).astype(np.int64)
    if (rank < 0).any():
        bad = sorted(set(alerts["outcome"].to_numpy(dtype=object)[rank < 0].tolist()))
        raise ValueError(f"unknown alert outcomes: {bad}")
    # In `_grouped`'s order each disturbance is one run of alerts, earliest first (ties: the first
    # row), so its first alert opens the run and its outcome is the run's best rank.
    first = np.flatnonzero(starts)
    best = np.minimum.reduceat(rank[order], first)
    counts = np.diff(np.r_[first, len(order)])
    first_rows = order[first]
    out = alerts.iloc[first_rows].reset_index(drop=True)
    out["alerts"] = counts
    out["outcome"] = np.asarray(PRECEDENCE, dtype=object)[best]
    return out
