"""Staged test events: which alerts detected them, how fast, and which events were missed.

Pure functions over DataFrames; no database access.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from server.analytics import rates
from server.analytics.trend import as_utc

DEFAULT_TOLERANCE_S = 30.0


@dataclass(frozen=True)
class StagedMatch:
    """Staged events with their detection, and the alerts that detected them.

    events: staged_event_id, home_id, sound_class, started_at, ended_at, source, detected (bool),
        alert_id (first detecting alert; nullable Int64), latency_s (first detection minus the
        event start, seconds; NaN when missed), best_score (highest score among the detecting
        alerts; NaN when missed).
    matches: alert_id, staged_event_id; every alert that detects a staged event, once (an alert
        inside two overlapping events goes to the earlier-starting one). These alerts are
        detections, never false alarms.
    """

    events: pd.DataFrame
    matches: pd.DataFrame


@dataclass(frozen=True)
class Detection:
    """Detected share of staged events with both intervals, latency and the missed events.

    Latency quantiles use linear interpolation between order statistics (numpy's default).
    """

    events: int
    detected: int
    share: rates.ProportionEstimate
    share_exact: rates.ProportionEstimate
    latency_median_s: float
    latency_p90_s: float
    missed: pd.DataFrame


def match(
    events: pd.DataFrame,
    alerts: pd.DataFrame,
    installations: pd.DataFrame,
    *,
    tolerance_s: float = DEFAULT_TOLERANCE_S,
) -> StagedMatch:
    """Match alerts to staged test events.

    An alert detects an event when it has the event's sound class, its device was installed in the
    event's home at the alert's time, and its time lies within [start - tolerance, end + tolerance]
    (both ends included). Alerts of another class are left alone: they stay false alarms (or
    whatever their verdict says) for their own class.

    Parameters
    ----------
    events: staged_event_id, home_id, sound_class, started_at, ended_at (aware UTC), source.
    alerts: alert_id, device_id, sound_class, detected_at (aware UTC, clock skew already
        corrected), score.
    installations: device_id, home_id, installed_at, removed_at (NaT while installed).
    """
    if tolerance_s < 0:
        raise ValueError("the tolerance must not be negative")
    tol = pd.Timedelta(seconds=tolerance_s)
    ev = as_utc(
        events.loc[:, ["staged_event_id", "home_id", "sound_class", "started_at", "ended_at", "source"]],
        "started_at",
        "ended_at",
    )
    inst = as_utc(
        installations.loc[:, ["device_id", "home_id", "installed_at", "removed_at"]],
        "installed_at",
        "removed_at",
    )
    al = as_utc(
        alerts.loc[:, ["alert_id", "device_id", "sound_class", "detected_at", "score"]], "detected_at"
    )
    pairs = ev.merge(inst, on="home_id").merge(al, on=["device_id", "sound_class"])
    t = pairs["detected_at"]
    inside = (
        (t >= pairs["started_at"] - tol)
        & (t <= pairs["ended_at"] + tol)
        & (t >= pairs["installed_at"])
        & (pairs["removed_at"].isna() | (t < pairs["removed_at"]))
    )
    hits = pairs.loc[inside, ["staged_event_id", "started_at", "alert_id", "detected_at", "score"]]
    hits = hits.drop_duplicates(["staged_event_id", "alert_id"])

    first = hits.sort_values(
        ["staged_event_id", "detected_at", "alert_id"], kind="mergesort"
    ).drop_duplicates("staged_event_id")
    first = first.assign(latency_s=(first["detected_at"] - first["started_at"]).dt.total_seconds())
    best = hits.groupby("staged_event_id")["score"].max().rename("best_score")
    out = ev.merge(first[["staged_event_id", "alert_id", "latency_s"]], on="staged_event_id", how="left")
    out = out.merge(best, left_on="staged_event_id", right_index=True, how="left")
    out["alert_id"] = out["alert_id"].astype("Int64")
    out["latency_s"] = out["latency_s"].astype(np.float64)
    out["best_score"] = out["best_score"].astype(np.float64)
    out["detected"] = out["alert_id"].notna().to_numpy(dtype=bool)
    out = out.sort_values(["started_at", "staged_event_id"], kind="mergesort").reset_index(drop=True)

    matches = (
        hits.sort_values(["alert_id", "started_at", "staged_event_id"], kind="mergesort")
        .drop_duplicates("alert_id")[["alert_id", "staged_event_id"]]
        .reset_index(drop=True)
    )
    return StagedMatch(events=out, matches=matches)


def detection(events: pd.DataFrame, *, confidence_level: float = 0.95) -> Detection:
    """Detected share (Wilson; Clopper-Pearson beside it), median and 90th-percentile latency.

    `events` is `StagedMatch.events`, possibly filtered (one sound class, one week). Missed events
    keep their columns staged_event_id, home_id, sound_class, started_at, ended_at, source.
    """
    n = len(events)
    detected = int(events["detected"].sum()) if n else 0
    latency = events.loc[events["detected"], "latency_s"].to_numpy(dtype=np.float64)
    median, p90 = np.quantile(latency, [0.5, 0.9]) if len(latency) else (math.nan, math.nan)
    missed = events.loc[
        ~events["detected"].astype(bool),
        ["staged_event_id", "home_id", "sound_class", "started_at", "ended_at", "source"],
    ]
    return Detection(
        events=n,
        detected=detected,
        share=rates.proportion(detected, n, confidence_level=confidence_level, method="wilson"),
        share_exact=rates.proportion(
            detected, n, confidence_level=confidence_level, method="clopper-pearson"
        ),
        latency_median_s=float(median),
        latency_p90_s=float(p90),
        missed=missed.reset_index(drop=True),
    )
