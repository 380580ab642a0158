"""Monitored time: where and when listening counts, and how it splits into weeks.

A device's listening counts while it is installed in a home whose lifecycle state is monitored
(installed, active, or paused while still listening), inside the trial and reporting window.
`monitored_windows` builds those windows from the register and `split_by_firmware` cuts them
where a device's reported firmware changed; the database (see `load`) clips
listening segments to them and sums per window and week; `spread_over_buckets` turns those sums
into seconds per week. Pure functions; no database access.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from server.analytics import rates
from server.analytics.trend import as_utc

DEFAULT_MONITORED_STATES = ("installed", "active", "paused")
WINDOW_COLUMNS = ["window_id", "installation_id", "device_id", "home_id", "room", "started_at", "ended_at"]


def home_intervals(
    changes: pd.DataFrame,
    *,
    until: dt.datetime,
    monitored_states: Sequence[str] = DEFAULT_MONITORED_STATES,
) -> pd.DataFrame:
    """Stretches of time in which each home's devices may contribute monitored time.

    Parameters
    ----------
    changes: home_id, at (aware UTC), to_state, listening (bool; False on a pause that stops
        listening). Each row starts a state that lasts until the home's next change, or `until`.

    Returns
    -------
    home_id, started_at, ended_at for the monitored states (adjacent stretches merged).
    """
    if changes.empty:
        return pd.DataFrame(
            {
                "home_id": pd.Series(dtype=np.int64),
                "started_at": pd.Series(dtype="datetime64[ns, UTC]"),
                "ended_at": pd.Series(dtype="datetime64[ns, UTC]"),
            }
        )
    c = as_utc(changes, "at").sort_values(["home_id", "at"], kind="mergesort").reset_index(drop=True)
    nxt = c.groupby("home_id")["at"].shift(-1)
    c["ended_at"] = nxt.fillna(pd.Timestamp(until))
    c["monitored"] = c["to_state"].isin(list(monitored_states)) & c["listening"].astype(bool)
    # Merge consecutive monitored rows of a home (for example installed -> active) into one stretch.
    c["run"] = (c["monitored"] != c.groupby("home_id")["monitored"].shift()).cumsum()
    m = c[c["monitored"] & (c["ended_at"] > c["at"])]
    out = m.groupby(["home_id", "run"], sort=True).agg(started_at=("at", "min"), ended_at=("ended_at", "max"))
    return out.reset_index()[["home_id", "started_at", "ended_at"]]


def monitored_windows(
    installations: pd.DataFrame,
    intervals: pd.DataFrame,
    *,
    start: dt.datetime,
    end: dt.datetime,
) -> pd.DataFrame:
    """Windows in which a device's listening is monitored time.

    Parameters
    ----------
    installations: installation_id, device_id, home_id, room, installed_at, removed_at (NaT while
        installed); the register's current rows, so a corrected date applies everywhere.
    intervals: from `home_intervals`.
    start, end: the trial and reporting window, [start, end).

    Returns
    -------
    window_id (0..n-1), installation_id, device_id, home_id, room, started_at, ended_at.
    If two installations of one device overlap (a device moved before the first was closed), the
    earlier one ends where the later one begins, so no second of listening counts twice.
    """
    start_ts, end_ts = pd.Timestamp(start).tz_convert("UTC"), pd.Timestamp(end).tz_convert("UTC")
    inst = as_utc(installations, "installed_at", "removed_at").sort_values(
        ["device_id", "installed_at", "installation_id"], kind="mergesort"
    )
    nxt = inst.groupby("device_id")["installed_at"].shift(-1)
    removed = inst["removed_at"].fillna(end_ts)
    inst["until"] = removed.where(nxt.isna() | (removed <= nxt), nxt)
    pairs = inst.merge(as_utc(intervals, "started_at", "ended_at"), on="home_id")
    lo = pairs[["installed_at", "started_at"]].max(axis=1).clip(lower=start_ts)
    hi = pairs[["until", "ended_at"]].min(axis=1).clip(upper=end_ts)
    out = pairs.assign(started_at=lo, ended_at=hi)[lo < hi]
    out = out.sort_values(["device_id", "started_at"], kind="mergesort").reset_index(drop=True)
    out.insert(0, "window_id", np.arange(len(out), dtype=np.int64))
    return out[WINDOW_COLUMNS]


def split_by_firmware(windows: pd.DataFrame, changes: pd.DataFrame, current: pd.Series) -> pd.DataFrame:
    """Windows cut where their device's firmware changed, each carrying the firmware it ran.

    Parameters
    ----------
    windows: from `monitored_windows`.
    changes: device_id, at (aware UTC), firmware: from `at` on, the device reported `firmware`
        (its heartbeats say which firmware runs).
    current: firmware now, indexed by device_id, for a device with no recorded change.

    Returns
    -------
    The window columns plus firmware, window_id renumbered 0..n-1 (by device, then start). A
    time before a device's first recorded change takes that change's firmware: the device
    reported no other before it.
    """
    # One time resolution throughout (stored and computed times may differ in unit).
    ch = as_utc(changes, "at").sort_values(["device_id", "at"], kind="mergesort").reset_index(drop=True)
    ch["at"] = ch["at"].dt.as_unit("ns")
    # A report that repeats the firmware before it changes nothing.
    ch = ch[ch["firmware"] != ch.groupby("device_id")["firmware"].shift()]
    w = as_utc(windows.drop(columns=["window_id"]), "started_at", "ended_at").reset_index(drop=True)
    w["started_at"] = w["started_at"].dt.as_unit("ns")
    w["ended_at"] = w["ended_at"].dt.as_unit("ns")
    # Times before a device's first report take that report's firmware, so its first is no cut.
    later = ch[ch["device_id"].duplicated()]
    cuts = (
        w[["device_id", "started_at", "ended_at"]]
        .reset_index()
        .merge(later[["device_id", "at"]], on="device_id")
    )
    cuts = cuts[(cuts["at"] > cuts["started_at"]) & (cuts["at"] < cuts["ended_at"])]
    bounds = pd.concat(
        [
            pd.DataFrame({"row": np.arange(len(w)), "piece_start": w["started_at"].to_numpy()}),
            pd.DataFrame({"row": cuts["index"].to_numpy(), "piece_start": cuts["at"].to_numpy()}),
        ],
        ignore_index=True,
    ).sort_values(["row", "piece_start"], kind="mergesort")
    pieces = w.iloc[bounds["row"].to_numpy()].reset_index(drop=True)
    starts = pd.Series(bounds["piece_start"].to_numpy(), dtype=w["started_at"].dtype)
    next_start = starts.shift(-1)
    last_of_row = bounds["row"].to_numpy() != np.r_[bounds["row"].to_numpy()[1:], -1]
    pieces["ended_at"] = pieces["ended_at"].where(last_of_row, next_start)
    pieces["started_at"] = starts
    pieces = pieces.sort_values(["device_id", "started_at"], kind="mergesort").reset_index(drop=True)
    firmware = pd.Series(np.nan, index=pieces.index, dtype=object)
    if len(ch) and len(pieces):
        found = pd.merge_asof(
            pieces[["device_id", "started_at"]].reset_index().sort_values("started_at", kind="mergesort"),
            ch[["device_id", "at", "firmware"]].sort_values("at", kind="mergesort"),
            left_on="started_at",
            right_on="at",
            by="device_id",
            direction="backward",
        ).set_index("index")["firmware"]
        firmware = found.reindex(pieces.index)
        first = ch.groupby("device_id")["firmware"].first()
        firmware = firmware.fillna(pieces["device_id"].map(first))
    firmware = firmware.fillna(pieces["device_id"].map(current)).fillna("unknown")
    pieces["firmware"] = firmware.astype(object).to_numpy()
    pieces.insert(0, "window_id", np.arange(len(pieces), dtype=np.int64))
    return pieces[[*WINDOW_COLUMNS, "firmware"]]


def spread_over_buckets(
    pieces: pd.DataFrame, bucket_start_s: Callable[[NDArray[np.int64]], NDArray[np.float64]]
) -> pd.DataFrame:
    """Seconds per window and bucket (week), from sums over clipped listening pieces.

    Parameters
    ----------
    pieces: window_id, first_bucket, last_bucket, pieces (count), sum_start_s, sum_end_s: the
        clipped pieces of listening grouped by window and by the buckets holding their start and
        end, with their start and end times (UTC epoch seconds) summed.
    bucket_start_s: UTC epoch second at which each bucket index begins.

    Returns
    -------
    window_id, bucket, seconds. A piece inside one bucket adds end - start; a piece across
    buckets adds (next bucket start - start) to its first bucket, (end - bucket start) to its
    last, and whole buckets between, so the sums stay exact across daylight-saving changes.
    """
    p = pieces
    same = p[p["first_bucket"] == p["last_bucket"]]
    parts = [
        pd.DataFrame(
            {
                "window_id": same["window_id"].to_numpy(),
                "bucket": same["first_bucket"].to_numpy(),
                "seconds": (same["sum_end_s"] - same["sum_start_s"]).to_numpy(dtype=np.float64),
            }
        )
    ]
    span = p[p["first_bucket"] < p["last_bucket"]]
    if len(span):
        first = span["first_bucket"].to_numpy(dtype=np.int64)
        last = span["last_bucket"].to_numpy(dtype=np.int64)
        n = span["pieces"].to_numpy(dtype=np.float64)
        wid = span["window_id"].to_numpy()
        parts.append(
            pd.DataFrame(
                {
                    "window_id": wid,
                    "bucket": first,
                    "seconds": n * bucket_start_s(first + 1) - span["sum_start_s"].to_numpy(),
                }
            )
        )
        parts.append(
            pd.DataFrame(
                {
                    "window_id": wid,
                    "bucket": last,
                    "seconds": span["sum_end_s"].to_numpy() - n * bucket_start_s(last),
                }
            )
        )
        gaps = last - first - 1
        if gaps.sum() > 0:
            rep = np.repeat(np.arange(len(span)), gaps)
            offs = np.concatenate([np.arange(1, g + 1) for g in gaps if g > 0])
            mid = first[rep] + offs
            parts.append(
                pd.DataFrame(
                    {
                        "window_id": wid[rep],
                        "bucket": mid,
                        "seconds": n[rep] * (bucket_start_s(mid + 1) - bucket_start_s(mid)),
                    }
                )
            )
    out = pd.concat(parts, ignore_index=True)
    out = out.groupby(["window_id", "bucket"], as_index=False, sort=True)["seconds"].sum()
    out["bucket"] = out["bucket"].astype(np.int64)
    return out


def monitored_time(
    by_bucket: pd.DataFrame,
    windows: pd.DataFrame,
    *,
    by: Sequence[str],
    buckets: Sequence[int] | None = None,
) -> pd.DataFrame:
    """Monitored seconds and home-months summed over `by` (columns of the windows or 'bucket').

    Parameters
    ----------
    by_bucket: from `spread_over_buckets`.
    windows: from `monitored_windows`, possibly with more columns joined (hardware_model, ...).
    buckets: keep only these bucket indices (for example the reporting week); None keeps all.

    Returns
    -------
    <by...>, seconds, home_months. Groups of `windows` that had no listening at all are kept with
    zero seconds (offline time is not monitored time) unless `by` includes 'bucket'.
    """
    data = by_bucket if buckets is None else by_bucket[by_bucket["bucket"].isin(list(buckets))]
    merged = data.merge(windows, on="window_id")
    keys = list(by)
    out = (
        merged.groupby(keys, as_index=False, dropna=False)["seconds"].sum()
        if keys
        else pd.DataFrame({"seconds": [float(merged["seconds"].sum())]})
    )
    if keys and "bucket" not in keys:
        every = windows[keys].drop_duplicates()
        out = every.merge(out, on=keys, how="left").fillna({"seconds": 0.0})
    out["seconds"] = out["seconds"].astype(np.float64)
    out["home_months"] = out["seconds"] / rates.HOME_MONTH_S
    return out.reset_index(drop=True)


def overlapping_homes(windows: pd.DataFrame) -> NDArray[np.int64]:
    """Homes with two windows that overlap in time: two devices of the home listened at once.

    Only in these homes can summing the devices' listening count an hour twice; in every other
    home (one device, or devices one after another) the home's monitored time is that sum.
    """
    if windows.empty:
        return np.zeros(0, dtype=np.int64)
    w = as_utc(windows.loc[:, ["home_id", "started_at", "ended_at"]], "started_at", "ended_at")
    w = w.sort_values(["home_id", "started_at"], kind="mergesort").reset_index(drop=True)
    home = w["home_id"].to_numpy(dtype=np.int64)
    start = epoch_of(w["started_at"])
    reach = pd.Series(epoch_of(w["ended_at"])).groupby(home).cummax().to_numpy()
    same_home = np.r_[False, home[1:] == home[:-1]]
    hit = same_home & (start < np.r_[-np.inf, reach[:-1]])
    return np.unique(home[hit])


def epoch_of(values: pd.Series) -> NDArray[np.float64]:
    """UTC epoch seconds of aware timestamps (any stored resolution)."""
    return np.asarray(pd.DatetimeIndex(values).as_unit("ns").asi8 / 1e9, dtype=np.float64)


def merge_intervals(home_id: ArrayLike, start_s: ArrayLike, end_s: ArrayLike) -> pd.DataFrame:
    """The union of each home's intervals [start_s, end_s) as disjoint, sorted intervals.

    Returns home_id, start_s, end_s; empty intervals are dropped. Intervals that touch end to end
    merge into one (the union is the same either way).
    """
    h = np.asarray(home_id, dtype=np.int64)
    a = np.asarray(start_s, dtype=np.float64)
    b = np.asarray(end_s, dtype=np.float64)
    keep = b > a
    h, a, b = h[keep], a[keep], b[keep]
    order = np.lexsort((a, h))
    h, a, b = h[order], a[order], b[order]
    if not len(h):
        return pd.DataFrame({"home_id": h, "start_s": a, "end_s": b})
    # The furthest end reached so far within the home: a later interval starting after it opens
    # a new stretch.
    reach = pd.Series(b).groupby(h).cummax().to_numpy()
    fresh = np.r_[True, (h[1:] != h[:-1]) | (a[1:] > reach[:-1])]
    starts = np.flatnonzero(fresh)
    ends = np.r_[starts[1:] - 1, len(h) - 1]
    return pd.DataFrame({"home_id": h[starts], "start_s": a[starts], "end_s": reach[ends]})


def union_over_buckets(
    merged: pd.DataFrame,
    bucket_start_s: Callable[[NDArray[np.int64]], NDArray[np.float64]],
    buckets: tuple[int, int],
) -> pd.DataFrame:
    """Seconds per home and bucket of disjoint intervals (from `merge_intervals`).

    `buckets` is the (first, last) bucket index that every interval lies in. An interval is
    split at bucket starts by the rule of `spread_over_buckets`, so one device's home gets the
    same seconds per bucket either way. Returns home_id, bucket, seconds.
    """
    first, last = buckets
    edges = bucket_start_s(np.arange(first, last + 2, dtype=np.int64))
    a = merged["start_s"].to_numpy(dtype=np.float64)
    b = merged["end_s"].to_numpy(dtype=np.float64)
    # The bucket holding a time t: the last bucket starting at or before t.
    first_b = first - 1 + np.searchsorted(edges, a, side="right")
    last_b = first - 1 + np.searchsorted(edges, b, side="right")
    pieces = pd.DataFrame(
        {
            "window_id": merged["home_id"].to_numpy(dtype=np.int64),
            "first_bucket": first_b.astype(np.int64),
            "last_bucket": last_b.astype(np.int64),
            "pieces": np.ones(len(a), dtype=np.int64),
            "sum_start_s": a,
            "sum_end_s": b,
        }
    )
    out = spread_over_buckets(pieces, bucket_start_s)
    return out.rename(columns={"window_id": "home_id"})


def home_monitored(
    by_bucket: pd.DataFrame,
    windows: pd.DataFrame,
    union: pd.DataFrame,
    overlapping: ArrayLike,
) -> pd.DataFrame:
    """Monitored seconds per home and bucket: the time in which at least one of its devices listened.

    Parameters
    ----------
    by_bucket: window_id, bucket, seconds (`spread_over_buckets`): each window's listening.
    windows: window_id, home_id.
    union: home_id, bucket, seconds (`union_over_buckets`) for the `overlapping` homes.
    overlapping: homes whose windows overlap in time (`overlapping_homes`); every other home's
        time is the sum of its windows' (their listening never overlaps).

    Returns
    -------
    home_id, bucket, seconds, sorted by home and bucket.
    """
    over = np.asarray(overlapping, dtype=np.int64)
    home_of = windows.set_index("window_id")["home_id"]
    summed = by_bucket.assign(home_id=by_bucket["window_id"].map(home_of).to_numpy())
    summed = summed[~summed["home_id"].isin(over)]
    summed = summed.groupby(["home_id", "bucket"], as_index=False, sort=False)["seconds"].sum()
    parts = [
        summed[["home_id", "bucket", "seconds"]],
        union.loc[union["home_id"].isin(over), ["home_id", "bucket", "seconds"]],
    ]
    out = pd.concat(parts, ignore_index=True)
    out = out.astype({"home_id": np.int64, "bucket": np.int64, "seconds": np.float64})
    return out.sort_values(["home_id", "bucket"], kind="mergesort").reset_index(drop=True)
