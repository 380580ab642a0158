"""The weekly trial summary: every figure, per sound class, for the ISO week and the trial to date.

`build_summary` is the one service function behind the summary page, the staff JSON and CSV API
and `trialhouse report weekly`. It reads through `load` and computes with the pure modules.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import logging
import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from server.analytics import (
    breakdowns,
    compare,
    disturbances,
    homerate,
    load,
    rates,
    shares,
    staged,
    trend,
    whatif,
)
from server.errors import ValidationFailed
from server.quota import service as quota_service
from server.review import overview
from server.trials import service as trials_service
from server.trials.models import Trial

log = logging.getLogger(__name__)

SCOPES = ("week", "to_date")
OUTCOMES = ("false_alarm", "confirmed", "unsure", "unusable", "pending")
# Review grades of a false alarm: the sound resembles the target (forgivable) or not.
GRADE_NAMES = {"resembles": "forgivable", "unrelated": "unforgivable"}
NOT_GRADED = "not graded"
NOT_RECORDED = "not_recorded"
DIMENSIONS = (
    ("firmware", "Firmware (as its heartbeats reported at the time)"),
    ("hardware_model", "Hardware model"),
    ("room", "Room"),
)
DEFAULT_SEED = 20261123
WHATIF_STEP_MILLI = 20  # threshold grid step: 0.02 on the score scale
SILENT_AFTER_S = 24 * 3600.0

DEFINITIONS = (
    "Monitored time: the listening of devices while installed in a home that is installed, active, or "
    "paused but still listening, inside the trial and the reporting window. Offline and muted time is "
    "not monitored time. A home-month is 30.4375 days (365.25 / 12) of monitored time.",
    "A home is monitored while at least one of its devices listens: a home with two devices listening "
    "through the same month gives one home-month, not two (the union of its devices' listening time). "
    "Rates per home-month, their intervals, the week-by-week trend and readiness use this time.",
    "Device-months: the tables by firmware, hardware model and room sum each device's own listening, "
    "because those properties belong to a device; there two devices of one home listening for a month "
    "are two device-months, and each false-alarm alert counts once.",
    "Disturbance: a household is disturbed once when its devices alert on one sound. Alerts of one sound "
    "class from one home belong to one disturbance when they come at most {window:g} s after its first "
    "alert (the trial's disturbance window); a later alert starts a new disturbance, so disturbances do "
    "not chain and none lasts longer than the window. A disturbance is confirmed if any of its alerts "
    "was confirmed, else a false alarm if any was one, else awaiting review if any waits, else unsure "
    "if any was judged unsure, else unusable. It belongs to the week of its first alert. False alarms "
    "are shown both ways; the target, the intervals, readiness and the per-home figures are judged on "
    "false-alarm disturbances.",
    "False alarm: an alert whose final review verdict is false alarm. Alerts awaiting review, and those "
    "judged unsure or unusable, are counted and shown apart; they are never folded into either side.",
    "Staged test event: a test sound a coordinator played on purpose and logged (home, sound class, start, "
    "end, source). An alert of the same class from a device installed in that home within the event's "
    "window, widened by {tol:g} s each side, detects it; it is a detection, not a false alarm. Latency "
    "runs from the logged start of the event.",
    "Readiness: one rule for every verdict, printed beside it. Alerts awaiting review or judged unsure "
    "count as false alarms for the upper bound the rule uses, so a review backlog holds readiness back; "
    "the page shows the rate with none of them and with all of them counted as false alarms. Unusable "
    "clips enter no rate and are counted and shown beside every verdict.",
    "Home-level interval: the rate over homes, allowing homes to differ from one another. With fewer than "
    "10 homes monitored the spread between homes cannot be judged, and the page says so rather than "
    "print an interval.",
    "Homes clearly above the target, and homes that stand out from chance: each home is tested, and the "
    "tests are corrected for testing every home at once (the correction is named beside the figure).",
    "Threshold what-if: false-alarm alerts at each raised threshold, with the staged detection it keeps; a "
    "threshold that loses staged detections, or detects none, is never marked acceptable.",
    "Only alerts detected inside monitored time count towards rates; those outside it (unassigned device, "
    "home not monitored, device offline) are listed under Operations.",
)
CAUTIONS = (
    "A detector in trial is not a certified life-safety device. Households keep their certified smoke and "
    "CO alarms; local codes and each household's consent govern how a trial device may be used.",
)
LIMITS = (
    "Staged test events are planned tests, not real emergencies: detection on them is a guide to, not a "
    "measure of, detection in a real fire or a real cry.",
    "Verdicts are human judgements; reviewer agreement is shown under Operations.",
    "Exact (Garwood) intervals assume false alarms arrive independently at one rate; the home-level "
    "interval drops that assumption by letting homes differ, and needs at least 10 homes to judge how much "
    "they do.",
)


# ---------------------------------------------------------------------------------------
# Results


@dataclass(frozen=True)
class AlertTally:
    """Alerts of one class in one scope by what became of them."""

    false_alarm: int
    confirmed: int
    unsure: int
    unusable: int
    pending: int
    staged_detections: int
    outside_monitored_time: int


@dataclass(frozen=True)
class DisturbanceTally:
    """Disturbances of one class in one scope by their outcome (see `disturbances.PRECEDENCE`).

    `alerts` is how many counted alerts they hold; a disturbance belongs to the scope of its
    first alert.
    """

    false_alarm: int
    confirmed: int
    unsure: int
    unusable: int
    pending: int
    alerts: int
    window_s: float


@dataclass(frozen=True)
class Breakdown:
    """False-alarm alerts per device-month by one device property, and the clustered comparison."""

    dimension: str
    title: str
    table: pd.DataFrame
    comparison: compare.GroupComparison


@dataclass(frozen=True)
class ClassFigures:
    """Every figure for one sound class over one scope (the week or the trial to date)."""

    sound_class: str
    scope: str
    label: str
    alerts: AlertTally
    disturbances: DisturbanceTally
    homes_monitored: int
    home_months: float
    device_months: float
    rate: rates.RateEstimate
    disturbance_rate: rates.RateEstimate
    home_rate: homerate.HomeRate
    overdispersion: rates.Overdispersion
    homes_note: str | None
    homes: pd.DataFrame
    concentration: shares.Concentration
    exposure_concentration: shares.ExposureConcentration
    causes: pd.DataFrame
    grades: pd.DataFrame
    above_target: shares.HomesAboveTargetAdjusted
    breakdowns: tuple[Breakdown, ...]
    firmware_comparison: compare.PairComparison | None
    detection: staged.Detection
    whatif: pd.DataFrame
    whatif_floor: float
    readiness: homerate.ReadinessVerdict


@dataclass(frozen=True)
class ClassSummary:
    sound_class: str
    week: ClassFigures
    to_date: ClassFigures
    trend: pd.DataFrame


@dataclass(frozen=True)
class ReviewFigures:
    backlog: int
    oldest_age_s: float
    median_age_s: float
    double_reviewed: int
    percent_agreement: float
    kappa: float
    kappa_reason: str | None
    alpha: float


@dataclass(frozen=True)
class QuotaLine:
    label: str
    count: int
    min_count: int | None
    max_count: int | None
    status: str


@dataclass(frozen=True)
class Operations:
    """The week's running of the pilot. Device states (silent, clock skew) are as of `as_of`."""

    as_of: dt.datetime
    homes_monitored: int
    homes_with_devices: int
    devices_monitored: int
    devices_installed: int
    uptime_share: float
    silent_devices: tuple[str, ...]
    skewed_devices: tuple[tuple[str, float], ...]
    skew_limit_s: float
    outside_monitored_time: pd.DataFrame
    review: ReviewFigures | None
    quota: tuple[QuotaLine, ...] | None


@dataclass(frozen=True)
class WeeklySummary:
    trial_code: str
    trial_name: str
    timezone: str
    target: float
    confidence_level: float
    week: trend.Week
    trial_start: dt.datetime
    report_end: dt.datetime
    generated_at: dt.datetime
    staged_tolerance_s: float
    seed: int
    classes: tuple[ClassSummary, ...]
    operations: Operations
    definitions: tuple[str, ...]
    cautions: tuple[str, ...]
    limits: tuple[str, ...]
    notes: tuple[str, ...]


# ---------------------------------------------------------------------------------------
# Building


def choose_week(trial: Trial, week: str | None, now: dt.datetime) -> trend.Week:
    """The requested ISO week, or the last complete one; 422 for a bad label or a week out of range."""
    if week:
        try:
            chosen = trend.week(week, trial.timezone)
        except ValueError as exc:
            raise ValidationFailed(f"{exc}.", {"week": "Give an ISO week such as 2026-W48."}) from None
    else:
        chosen = trend.last_complete_week(now, trial.timezone)
    start = trend.local_midnight(trial.starts_on, trial.timezone)
    if chosen.end_at <= start:
        if not week:  # the trial is in its first week: show that week so far
            return trend.week_of(start, trial.timezone)
        raise ValidationFailed(
            f"Trial {trial.code} starts on {trial.starts_on}, after {chosen.label}.",
            {"week": "Pick a week from the trial's start on."},
        )
    if chosen.start_at > now:
        raise ValidationFailed(
            f"{chosen.label} has not started yet.", {"week": "Pick a past or current week."}
        )
    return chosen


def build_summary(
    session: Session,
    *,
    trial_code: str,
    now: dt.datetime,
    week: str | None = None,
    confidence_level: float = 0.95,
    staged_tolerance_s: float = staged.DEFAULT_TOLERANCE_S,
    seed: int = DEFAULT_SEED,
    firmware_pair: tuple[str, str] | None = None,
    skew_limit_s: float = 300.0,
) -> WeeklySummary:
    """Every figure of the weekly summary for one trial and ISO week (default: the last complete one)."""
    trial = trials_service.get_trial(session, trial_code)
    chosen = choose_week(trial, week, now)
    data = load.load_pilot(session, trial, chosen, now=now, staged_tolerance_s=staged_tolerance_s)
    ctx = _Context(data, confidence_level, staged_tolerance_s, seed, firmware_pair)
    classes = tuple(
        ClassSummary(
            sound_class=c,
            week=ctx.figures(i, c, "week"),
            to_date=ctx.figures(i, c, "to_date"),
            trend=ctx.trend(c),
        )
        for i, c in enumerate(trial.sound_classes)
    )
    notes: list[str] = []
    ops = _operations(session, ctx, now=now, skew_limit_s=skew_limit_s, notes=notes)
    return WeeklySummary(
        trial_code=trial.code,
        trial_name=trial.name,
        timezone=trial.timezone,
        target=float(trial.fa_target_per_home_month),
        confidence_level=confidence_level,
        week=chosen,
        trial_start=data.start,
        report_end=data.end,
        generated_at=now,
        staged_tolerance_s=staged_tolerance_s,
        seed=seed,
        classes=classes,
        operations=ops,
        definitions=tuple(
            d.format(tol=staged_tolerance_s, window=float(trial.disturbance_window_s)) for d in DEFINITIONS
        ),
        cautions=CAUTIONS,
        limits=LIMITS,
        notes=tuple(notes),
    )


_COUNTED_KEYS = ["window_id", "period", "sound_class", "outcome", "cause", "resemblance"]
_FALSE_ALARM = OUTCOMES.index("false_alarm")
_OPEN = [OUTCOMES.index(o) for o in disturbances.OPEN]


def _codes(frame: pd.DataFrame, other: pd.DataFrame, key: str) -> tuple[np.ndarray, np.ndarray, Any]:
    """Codes of column `key` in both frames on one scale, and the values they stand for.

    A missing value is a value of its own, as when pandas merges on the column.
    """
    both = pd.concat([frame[key], other[key]], ignore_index=True)
    codes, values = pd.factorize(both, use_na_sentinel=False)
    return codes[: len(frame)], codes[len(frame) :], values


def _matches_per_row(frame_codes: list[np.ndarray], other_codes: list[np.ndarray]) -> np.ndarray:
    """For each frame row, how many rows of the other frame have the same codes in every key."""
    here = np.zeros(len(frame_codes[0]), dtype=np.int64)
    there = np.zeros(len(other_codes[0]), dtype=np.int64)
    size = 1
    for a, b in zip(frame_codes, other_codes, strict=True):
        n = int(max(a.max(initial=-1), b.max(initial=-1))) + 1
        if size * n >= 2**62:  # renumber the keys so far densely before they could overflow
            dense = pd.factorize(np.concatenate([here, there]))[0]
            here, there, size = dense[: len(here)], dense[len(here) :], int(dense.max(initial=-1)) + 1
        here, there, size = here * n + a, there * n + b, size * n
    keys, counts = np.unique(there, return_counts=True)
    if len(keys) == 0:
        return np.zeros(len(here), dtype=np.int64)
    at = np.searchsorted(keys, here).clip(max=len(keys) - 1)
    return np.where(keys[at] == here, counts[at], 0)


def _subtract(frame: pd.DataFrame, removed: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """`frame` (keys..., alerts) less the `removed` rows (one per alert), matched on `keys`."""
    if removed.empty:
        return frame
    codes = [_codes(frame, removed, k) for k in keys]
    taken = _matches_per_row([c[0] for c in codes], [c[1] for c in codes])
    alerts = frame["alerts"].to_numpy(dtype=np.int64) - taken
    return frame.assign(alerts=alerts)[alerts > 0].reset_index(drop=True)


@dataclass(frozen=True)
class _Groups:
    """Windows grouped by a key (home code, firmware, ...) and their monitored time in one scope."""

    keys: pd.Index
    home_months: np.ndarray
    of_window: np.ndarray  # each window's group; -1 for none

    @classmethod
    def of(cls, home_months: pd.Series, key: pd.Series, *, dropna: bool) -> _Groups:
        # pandas' own grouped (compensated) sum: the same totals as grouping the windows frame.
        summed = home_months.groupby(key, dropna=dropna).sum()
        return cls(summed.index, summed.to_numpy(dtype=np.float64), summed.index.get_indexer(key))

    def total(self, per_window: np.ndarray) -> np.ndarray:
        """An integer count per window, summed by group."""
        inside = self.of_window >= 0
        sums = np.bincount(self.of_window[inside], weights=per_window[inside], minlength=len(self.keys))
        return sums.astype(np.int64)


@dataclass(frozen=True)
class _Tally:
    """Counted alerts of one class in one scope."""

    false_alarms: np.ndarray  # per window
    by_outcome: dict[str, int]
    causes: pd.DataFrame  # cause, false_alarms
    grades: pd.DataFrame  # grade, false_alarms


class _Context:
    """Frames prepared once (staged detections taken out) for every class and scope.

    Everything that depends on the scope alone (monitored time per window, home and breakdown
    group) is summed here once; `figures` adds the class's counts to it.
    """

    def __init__(
        self,
        data: load.PilotData,
        confidence_level: float,
        tolerance_s: float,
        seed: int,
        firmware_pair: tuple[str, str] | None,
    ) -> None:
        self.data = data
        self.level = confidence_level
        self.seed = seed
        self.target = float(data.trial.fa_target_per_home_month)
        codes = data.homes.set_index("home_id")["home_code"]
        self.codes = codes
        self.windows = data.windows.assign(home_code=data.windows["home_id"].map(codes))
        self.causes = {c["code"]: c["label"] for c in (data.trial.causes or [])}

        self.match = staged.match(
            data.staged_events, data.staged_alerts, data.installations, tolerance_s=tolerance_s
        )
        matched = data.staged_alerts[data.staged_alerts["alert_id"].isin(self.match.matches["alert_id"])]
        self.matched = matched
        m = matched[matched["counted"]]
        self._count_rows(data.counted, m)
        self.by_week = _subtract(data.by_week, m, ["week_index", "sound_class", "outcome"])
        home_of_window = data.windows.set_index("window_id")["home_id"]
        m_fa = m[m["outcome"] == "false_alarm"]
        m_fa = m_fa.assign(
            home_id=m_fa["window_id"].astype(np.int64).map(home_of_window).to_numpy(dtype=np.int64)
        )
        self.fa_scores = _subtract(data.fa_scores, m_fa, ["period", "sound_class", "score_milli", "home_id"])
        week_index = data.week.index
        mon = data.monitored
        self.seconds = {
            "week": mon[mon["bucket"] == week_index].groupby("window_id")["seconds"].sum(),
            "to_date": mon.groupby("window_id")["seconds"].sum(),
        }
        self.firmware_pair = firmware_pair or self._busiest_firmware()

        # A home's monitored time is the union of its devices' listening (`load.home_monitored`);
        # a device property's is the sum of its devices' listening: device-months.
        hm = data.home_monitored
        union_s = {
            "week": hm[hm["bucket"] == week_index].groupby("home_id")["seconds"].sum(),
            "to_date": hm.groupby("home_id")["seconds"].sum(),
        }
        self._homes: dict[str, _Groups] = {}
        self._dims: dict[tuple[str, str], _Groups] = {}
        self._device_months: dict[str, float] = {}
        self._window_rows: dict[str, pd.DataFrame] = {}
        for scope in SCOPES:
            seconds = self.windows["window_id"].map(self.seconds[scope]).fillna(0.0)
            home_months = seconds / rates.HOME_MONTH_S
            by_device = _Groups.of(home_months, self.windows["home_code"], dropna=True)
            union = pd.Series(
                union_s[scope].to_numpy(dtype=np.float64), index=union_s[scope].index.map(codes)
            )
            self._homes[scope] = _Groups(
                by_device.keys,
                union.reindex(by_device.keys).fillna(0.0).to_numpy(dtype=np.float64) / rates.HOME_MONTH_S,
                by_device.of_window,
            )
            self._device_months[scope] = float(by_device.home_months.sum())
            self._window_rows[scope] = pd.DataFrame(
                {
                    "home_code": self.windows["home_code"].to_numpy(dtype=object),
                    **{
                        dim: self.windows[dim].fillna(NOT_RECORDED).astype(str).to_numpy(dtype=object)
                        for dim, _ in DIMENSIONS
                    },
                    "home_months": home_months.to_numpy(dtype=np.float64),
                }
            )
            for dim, _ in DIMENSIONS:
                self._dims[scope, dim] = _Groups.of(home_months, self.windows[dim], dropna=False)
        events = self.match.events
        self._events = {
            k: events.iloc[v] for k, v in events.groupby("sound_class", sort=False).indices.items()
        }
        self._trend_home_months: pd.DataFrame | None = None
        fs = self.fa_scores
        self._scores = fs["score_milli"].to_numpy(dtype=np.float64)
        self._score_alerts = fs["alerts"].to_numpy()
        self._score_week = (fs["period"] == "week").to_numpy(dtype=bool)
        self._score_rows = dict(fs.groupby("sound_class", sort=False).indices)
        self._score_home_code = fs["home_id"].map(codes).to_numpy(dtype=object)
        floors = data.score_floors
        self._floors = {
            k: whatif.score_floor(floors["min_score"].to_numpy()[rows])
            for k, rows in floors.groupby("sound_class", sort=False).indices.items()
        }
        week_matched = matched[matched["period"] == "week"]
        self._staged_detections = {
            "week": week_matched["sound_class"].value_counts().to_dict(),
            "to_date": matched["sound_class"].value_counts().to_dict(),
        }
        self.window_s = float(data.trial.disturbance_window_s)
        kept = data.counted_alerts[~data.counted_alerts["alert_id"].isin(m["alert_id"])]
        dist = disturbances.summarise(kept, window_s=self.window_s)
        self.disturbances = dist.assign(home_code=dist["home_id"].map(codes))
        self._d_rows = dict(self.disturbances.groupby("sound_class", sort=False).indices)
        # Each disturbance's outcome (its position in OUTCOMES), period, alerts and home (position
        # in each scope's homes), worked out once for every class and scope.
        self._d_outcome = pd.Index(OUTCOMES).get_indexer(self.disturbances["outcome"])
        self._d_week = (self.disturbances["period"] == "week").to_numpy(dtype=bool)
        self._d_alerts = self.disturbances["alerts"].to_numpy(dtype=np.int64)
        of_home = codes.index.get_indexer(pd.Index(self.disturbances["home_id"]))
        self._d_home = {}
        for scope in SCOPES:
            at = self._homes[scope].keys.get_indexer(codes.to_numpy())
            self._d_home[scope] = np.where(of_home >= 0, at[of_home] if len(at) else -1, -1)
        self._outside = {
            scope: self._scoped(data.not_counted, scope).groupby("sound_class")["alerts"].sum().to_dict()
            for scope in SCOPES
        }

    def _count_rows(self, counted: pd.DataFrame, detections: pd.DataFrame) -> None:
        """Counted alerts as arrays, one element per row of `counted` less the staged detections.

        The same rows as `_subtract(counted, detections, _COUNTED_KEYS)` would leave, without building
        that frame: every figure needs only these columns' codes and the alerts.
        """
        codes = {k: _codes(counted, detections, k) for k in _COUNTED_KEYS}
        alerts = counted["alerts"].to_numpy(dtype=np.int64)
        if detections.empty:
            rows = np.arange(len(counted))
        else:
            alerts = alerts - _matches_per_row([c[0] for c in codes.values()], [c[1] for c in codes.values()])
            rows = np.flatnonzero(alerts > 0)

        def code_of(key: str, value: str) -> int:
            found = np.flatnonzero(pd.Index(codes[key][2]) == value)
            return int(found[0]) if len(found) else -1

        self._c_alerts = alerts[rows]
        self._c_window = pd.Index(self.windows["window_id"]).get_indexer(counted["window_id"])[rows]
        self._c_week = codes["period"][0][rows] == code_of("period", "week")
        self._c_false_alarm = codes["outcome"][0][rows] == code_of("outcome", "false_alarm")
        classes = codes["sound_class"]
        self._c_rows = {v: np.flatnonzero(classes[0][rows] == i) for i, v in enumerate(classes[2])}
        self._c_outcome = (codes["outcome"][0][rows], codes["outcome"][2])
        self._c_cause = (codes["cause"][0][rows], codes["cause"][2])
        self._c_grade = (codes["resemblance"][0][rows], codes["resemblance"][2])

    def _busiest_firmware(self) -> tuple[str, str] | None:
        t = self.windows.assign(seconds=self.windows["window_id"].map(self.seconds["to_date"]).fillna(0.0))
        busiest = t.groupby("firmware")["seconds"].sum().sort_values(ascending=False)
        busiest = busiest[busiest > 0]
        return (str(busiest.index[0]), str(busiest.index[1])) if len(busiest) >= 2 else None

    def _rng(self, *key: int) -> np.random.Generator:
        return np.random.default_rng([self.seed, *key])

    def _scoped(self, frame: pd.DataFrame, scope: str) -> pd.DataFrame:
        return frame[frame["period"] == "week"] if scope == "week" else frame

    def _tally(self, sound_class: str, scope: str) -> _Tally:
        rows = self._c_rows.get(sound_class, np.zeros(0, dtype=np.intp))
        if scope == "week":
            rows = rows[self._c_week[rows]]
        alerts = self._c_alerts
        codes, outcomes = self._c_outcome
        known = rows[codes[rows] >= 0]
        by_outcome = np.bincount(codes[known], weights=alerts[known], minlength=len(outcomes))
        fa = rows[self._c_false_alarm[rows]]
        windows = fa[self._c_window[fa] >= 0]
        per_window = np.bincount(
            self._c_window[windows], weights=alerts[windows], minlength=len(self.windows)
        ).astype(np.int64)
        return _Tally(
            false_alarms=per_window,
            by_outcome={o: int(n) for o, n in zip(outcomes, by_outcome, strict=True)},
            causes=self._by_category(fa, self._c_cause, "cause", lambda c: c or NOT_RECORDED),
            # Every grade has a row, if only of zero.
            grades=self._by_category(
                fa, self._c_grade, "grade", lambda g: GRADE_NAMES.get(g, NOT_GRADED), GRADE_NAMES.values()
            ),
        )

    def _by_category(
        self,
        rows: np.ndarray,
        factorized: tuple[np.ndarray, Any],
        column: str,
        name: Any,
        zero: Iterable[str] = (),
    ) -> pd.DataFrame:
        """False alarms of `rows` summed by a category (one row per value seen, under its shown name),
        and a row of zero for each name in `zero`."""
        codes, values = factorized
        present = np.flatnonzero(np.bincount(codes[rows], minlength=len(values)))
        sums = np.bincount(codes[rows], weights=self._c_alerts[rows], minlength=len(values))
        names = [name(values[i]) for i in present]
        zeros = list(zero)
        counts = np.concatenate([sums[present].astype(np.int64), np.zeros(len(zeros), dtype=np.int64)])
        return pd.DataFrame({column: names + zeros, "false_alarms": counts})

    def _disturbances(self, sound_class: str, scope: str) -> tuple[np.ndarray, np.ndarray, DisturbanceTally]:
        """Per home (in `_homes` order): false-alarm and open disturbances; and their tally."""
        rows = self._d_rows.get(sound_class, np.zeros(0, dtype=np.intp))
        if scope == "week":
            rows = rows[self._d_week[rows]]
        keys = self._homes[scope].keys
        at = self._d_home[scope][rows]
        outcome = self._d_outcome[rows]
        fa = np.bincount(at[(outcome == _FALSE_ALARM) & (at >= 0)], minlength=len(keys)).astype(np.int64)
        is_open = np.isin(outcome, _OPEN) & (at >= 0)
        opened = np.bincount(at[is_open], minlength=len(keys)).astype(np.int64)
        counts = np.bincount(outcome[outcome >= 0], minlength=len(OUTCOMES))
        tally = DisturbanceTally(
            **{o: int(n) for o, n in zip(OUTCOMES, counts, strict=True)},
            alerts=int(self._d_alerts[rows].sum()),
            window_s=self.window_s,
        )
        return fa, opened, tally

    def figures(self, class_index: int, sound_class: str, scope: str) -> ClassFigures:
        d, level, target = self.data, self.level, self.target
        s_index = SCOPES.index(scope)
        tally = self._tally(sound_class, scope)
        per_home = self._homes[scope]
        fa_home = per_home.total(tally.false_alarms)
        dist_home, open_home, dist_tally = self._disturbances(sound_class, scope)
        keep = (per_home.home_months > 0) | (fa_home > 0) | (dist_home > 0) | (open_home > 0)
        home_fa, home_hm = fa_home[keep], per_home.home_months[keep]
        home_dist, home_open = dist_home[keep], open_home[keep]
        total_fa = int(home_fa.sum())
        total_dist = int(home_dist.sum())
        total_hm = float(home_hm.sum())  # numpy's sum, which is what pandas' Series.sum does here
        rate = rates.poisson_rate(total_fa, total_hm, confidence_level=level)
        dist_rate = rates.poisson_rate(total_dist, total_hm, confidence_level=level)
        # Everything per home is on disturbances: what a household lives with.
        home_level = homerate.home_rate(home_dist, home_hm, confidence_level=level)
        disp = rates.overdispersion(home_dist, home_hm)
        by_home = pd.DataFrame(
            {"home_code": per_home.keys[keep], "false_alarms": home_dist, "home_months": home_hm}
        )
        ranked = shares.home_pareto(by_home, confidence_level=level)
        pareto = _homes_table(ranked, per_home.keys[keep], home_fa, home_open)

        causes = shares.category_shares(tally.causes, total_hm, category="cause", confidence_level=level)
        causes.insert(1, "label", [self.causes.get(c, c.replace("_", " ")) for c in causes["cause"]])
        grades = shares.category_shares(tally.grades, total_hm, category="grade", confidence_level=level)

        # Per device-window rows for the comparisons, clustered by home (device-months).
        window_rows = self._window_rows[scope].assign(false_alarms=tally.false_alarms)
        parts = []
        for dim, title in DIMENSIONS:
            groups = self._dims[scope, dim]
            # Only groups with monitored time are shown (taking them out first leaves the order alone).
            shown = groups.home_months > 0
            table = breakdowns.rates_table(
                dim,
                groups.keys[shown],
                groups.total(tally.false_alarms)[shown],
                groups.home_months[shown],
                confidence_level=level,
            )
            # A device property's monitored time sums its devices' listening: device-months, named so.
            table = table.rename(columns={"home_months": "device_months"})
            found = compare.compare_groups(window_rows, key=dim, confidence_level=level)
            found = dataclasses.replace(
                found, table=found.table.rename(columns={"home_months": "device_months"})
            )
            parts.append(Breakdown(dimension=dim, title=title, table=table, comparison=found))
        comparison = None
        if self.firmware_pair is not None:
            a, b = self.firmware_pair
            comparison = compare.compare_pair(window_rows, a, b, key="firmware", confidence_level=level)

        events = self._events.get(sound_class, self.match.events.iloc[:0])
        if scope == "week":
            events = events[events["started_at"] >= pd.Timestamp(d.week.start_at)]
        detection = staged.detection(events, confidence_level=level)
        detection = _with_codes(detection, self.codes)
        table, floor = self._whatif(sound_class, scope, total_hm, events)
        if len(table):
            table = table.assign(state=_never_green_blind(table))

        alerts = AlertTally(
            **{o: int(tally.by_outcome.get(o, 0)) for o in OUTCOMES},
            staged_detections=int(self._staged_detections[scope].get(sound_class, 0)),
            outside_monitored_time=int(self._outside[scope].get(sound_class, 0)),
        )
        return ClassFigures(
            sound_class=sound_class,
            scope=scope,
            label=d.week.label if scope == "week" else "trial to date",
            alerts=alerts,
            disturbances=dist_tally,
            homes_monitored=int((home_hm > 0).sum()),
            home_months=total_hm,
            device_months=self._device_months[scope],
            rate=rate,
            disturbance_rate=dist_rate,
            home_rate=home_level,
            overdispersion=disp,
            homes_note=_homes_note(home_level, disp, dist_rate),
            homes=pareto,
            concentration=shares.pareto_concentration(ranked, confidence_level=level),
            exposure_concentration=shares.exposure_concentration(
                by_home, rng=self._rng(class_index, s_index), alpha=1 - level
            ),
            causes=causes,
            grades=grades,
            above_target=shares.homes_above_target_adjusted(by_home, target, alpha=1 - level),
            breakdowns=tuple(parts),
            firmware_comparison=comparison,
            detection=detection,
            whatif=table,
            whatif_floor=floor,
            readiness=homerate.readiness_verdict(
                home_dist, home_open, home_hm, target, unusable=alerts.unusable, confidence_level=level
            ),
        )

    def _whatif(
        self, sound_class: str, scope: str, home_months: float, events: pd.DataFrame
    ) -> tuple[pd.DataFrame, float]:
        floor = self._floors.get(sound_class, math.nan)
        if math.isnan(floor):
            return pd.DataFrame(), floor
        # Scores arrive as thousandths (floor(1000 s)), so thresholds on that grid are exact.
        floor_milli = math.ceil(floor * 1000.0 - 1e-6)
        grid = whatif.threshold_grid(floor_milli, step=WHATIF_STEP_MILLI, top=1000.0)
        rows = self._score_rows.get(sound_class, np.zeros(0, dtype=np.intp))
        if scope == "week":
            rows = rows[self._score_week[rows]]
        best = np.floor(events["best_score"].to_numpy(dtype=np.float64) * 1000.0 + 1e-6)
        per_home = self._homes[scope]
        table = whatif.at_thresholds(
            self._scores[rows],
            home_months,
            best,
            grid,
            floor=floor_milli,
            target=self.target,
            fa_counts=self._score_alerts[rows],
            confidence_level=self.level,
            fa_homes=per_home.keys.get_indexer(self._score_home_code[rows]),
            home_months_by_home=per_home.home_months,
        )
        table["threshold"] = table["threshold"] / 1000.0
        return table, floor_milli / 1000.0

    def trend(self, sound_class: str) -> pd.DataFrame:
        d = self.data
        fa = self.by_week[
            (self.by_week["sound_class"] == sound_class) & (self.by_week["outcome"] == "false_alarm")
        ]
        if self._trend_home_months is None:  # the same for every class
            # Per home-month: the union of each home's devices' listening, week by week.
            hm = d.home_monitored.groupby("bucket")["seconds"].sum() / rates.HOME_MONTH_S
            self._trend_home_months = pd.DataFrame(
                {"week_index": hm.index.to_numpy(dtype=np.int64), "home_months": hm.to_numpy()}
            )
        rows = self._d_rows.get(sound_class, np.zeros(0, dtype=np.intp))
        dist = self.disturbances.iloc[rows[self._d_outcome[rows] == _FALSE_ALARM]]
        # The rate week by week is on false-alarm disturbances, as readiness is; alerts beside.
        weeks = pd.concat(
            [
                dist.groupby("week_index").size().rename("false_alarms").reset_index(),
                self._trend_home_months,
            ],
            ignore_index=True,
        ).fillna(0.0)
        first = trend.week_of(d.start, d.trial.timezone).index
        out = trend.weekly_rates(
            weeks,
            first_index=first,
            last_index=d.week.index,
            tz=d.trial.timezone,
            confidence_level=self.level,
        ).rename(columns={"false_alarms": "disturbances"})
        alerts = fa.groupby("week_index")["alerts"].sum()
        idx = np.arange(first, d.week.index + 1)
        out.insert(2, "false_alarms", alerts.reindex(idx, fill_value=0).to_numpy(dtype=np.int64))
        out["target"] = self.target
        return out


DETECTS_NOTHING = "detects_nothing"


def _never_green_blind(table: pd.DataFrame) -> np.ndarray:
    """The what-if states, with a threshold that detects none of the staged events never shown as
    acceptable (`whatif` calls it acceptable when the floor detected none either)."""
    state = table["state"].to_numpy(dtype=object).copy()
    blind = (table["events"].to_numpy() > 0) & (table["detected"].to_numpy() == 0)
    state[blind & (state == whatif.ACCEPTABLE)] = DETECTS_NOTHING
    return state


def _homes_table(
    ranked: pd.DataFrame, codes: pd.Index, false_alarms: np.ndarray, open_: np.ndarray
) -> pd.DataFrame:
    """The per-home table shown: `shares.home_pareto` over false-alarm disturbances, with each
    home's false-alarm alerts and open (awaiting review or unsure) disturbances beside."""
    fa = pd.Series(false_alarms, index=codes)
    op = pd.Series(open_, index=codes)
    out = ranked.rename(columns={"false_alarms": "disturbances"})
    out.insert(2, "false_alarms", fa.reindex(out["home_code"]).to_numpy(dtype=np.int64))
    out.insert(3, "open_disturbances", op.reindex(out["home_code"]).to_numpy(dtype=np.int64))
    return out


def _with_codes(detection: staged.Detection, codes: pd.Series) -> staged.Detection:
    """Missed events with home codes instead of internal ids."""
    m = detection.missed
    missed = pd.DataFrame(
        {
            "staged_event_id": m["staged_event_id"],
            "home_code": m["home_id"].map(codes),
            **{c: m[c] for c in ("sound_class", "started_at", "ended_at", "source")},
        }
    )
    return dataclasses.replace(detection, missed=missed)


def _homes_note(
    home_level: homerate.HomeRate, disp: rates.Overdispersion, exact: rates.RateEstimate
) -> str | None:
    """One line on why the home-level and exact intervals differ (or agree), true to the figures shown."""
    if home_level.reason is not None or disp.reason is not None:
        return None
    homes_differ = disp.p_value < 0.05 and disp.ratio > 1.5
    if not homes_differ and home_level.high > 1.25 * exact.high:
        return (
            f"Homes look alike so far (overdispersion {disp.ratio:.1f}), but {home_level.events} false "
            f"alarms over {home_level.homes} homes cannot show that they are: a few homes could hold most "
            "of them, so the home-level interval reaches higher than the exact Poisson interval."
        )
    if homes_differ:
        return (
            f"Homes are not alike (overdispersion {disp.ratio:.1f}, chi-square p = {disp.p_value:.2g}): "
            "the home-level interval allows for that and is wider than the exact Poisson interval, "
            "which treats every home-month as interchangeable."
        )
    return (
        f"Homes look alike (overdispersion {disp.ratio:.1f}), so the home-level and exact Poisson intervals "
        "are close."
    )


def _operations(
    session: Session, ctx: _Context, *, now: dt.datetime, skew_limit_s: float, notes: list[str]
) -> Operations:
    d = ctx.data
    week_s = ctx.seconds["week"]
    w = ctx.windows
    span = w["ended_at"].clip(upper=pd.Timestamp(d.end)) - w["started_at"].clip(
        lower=pd.Timestamp(d.week.start_at)
    )
    w = w.assign(
        window_s=span.dt.total_seconds().clip(lower=0.0), listening_s=w["window_id"].map(week_s).fillna(0.0)
    )
    in_week = w[w["window_s"] > 0]
    listening = in_week.groupby("device_id")["listening_s"].sum()
    installed_now = set(w.loc[w["ended_at"] >= pd.Timestamp(d.end), "device_id"])
    devices = d.devices[d.devices["device_id"].isin(installed_now)]
    last_seen = devices["last_seen_at"]
    silent = devices[last_seen.isna() | ((pd.Timestamp(now) - last_seen).dt.total_seconds() > SILENT_AFTER_S)]
    skewed = devices[devices["clock_skew_s"].abs() > skew_limit_s]
    outside = d.not_counted[d.not_counted["period"] == "week"].drop(columns="period").reset_index(drop=True)
    window_total = float(in_week["window_s"].sum())
    return Operations(
        as_of=now,
        homes_monitored=int(in_week.groupby("home_id")["listening_s"].sum().gt(0).sum()),
        homes_with_devices=int(in_week["home_id"].nunique()),
        devices_monitored=int(listening.gt(0).sum()),
        devices_installed=int(in_week["device_id"].nunique()),
        uptime_share=float(in_week["listening_s"].sum()) / window_total if window_total > 0 else math.nan,
        silent_devices=tuple(sorted(silent["serial"])),
        skewed_devices=tuple(
            (str(r.serial), float(r.clock_skew_s)) for r in skewed.sort_values("serial").itertuples()
        ),
        skew_limit_s=skew_limit_s,
        outside_monitored_time=outside,
        review=_review(session, d.trial, now, notes),
        quota=_quota(session, d.trial, notes),
    )


def _review(session: Session, trial: Trial, now: dt.datetime, notes: list[str]) -> ReviewFigures | None:
    brief = overview.agreement_brief(session, trial.id, now=now)
    return ReviewFigures(
        backlog=brief.backlog.count,
        oldest_age_s=brief.backlog.oldest_age_s,
        median_age_s=brief.backlog.median_age_s,
        double_reviewed=brief.double_reviewed,
        percent_agreement=brief.percent_agreement.estimate,
        kappa=brief.kappa_overall.estimate,
        kappa_reason=brief.kappa_overall.reason,
        alpha=brief.alpha.estimate,
    )


def _quota(session: Session, trial: Trial, notes: list[str]) -> tuple[QuotaLine, ...] | None:
    report = quota_service.quota_report(session, trial)
    return tuple(
        QuotaLine(
            label=s.target.label,
            count=s.count,
            min_count=s.target.min_count,
            max_count=s.target.max_count,
            status=s.status,
        )
        for s in report.targets
    )


# ---------------------------------------------------------------------------------------
# Plain forms for JSON and CSV


def _plain(value: Any) -> Any:
    """JSON-ready values: NaN and infinities become null, times ISO 8601 strings."""
    if isinstance(value, pd.DataFrame):
        return [{k: _plain(v) for k, v in row.items()} for row in value.to_dict("records")]
    if hasattr(value, "__dataclass_fields__"):
        return {k: _plain(getattr(value, k)) for k in value.__dataclass_fields__}
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.bool_ | bool):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, pd.Timestamp):
        return None if pd.isna(value) else value.isoformat()
    if isinstance(value, dt.datetime | dt.date):
        return value.isoformat()
    if value is pd.NaT or (
        value is not None and not isinstance(value, str) and pd.api.types.is_scalar(value) and pd.isna(value)
    ):
        return None
    return value


def summary_json(summary: WeeklySummary) -> dict[str, Any]:
    """The whole summary as JSON-ready data (NaN and infinite values are null)."""
    out: dict[str, Any] = _plain(summary)
    return out


def summary_tables(summary: WeeklySummary) -> dict[str, pd.DataFrame]:
    """Every table of the summary by name (`<class>-<scope>-<table>`, `<class>-trend`, `overview`)."""
    tables: dict[str, pd.DataFrame] = {}
    rows = []
    for cs in summary.classes:
        for f in (cs.week, cs.to_date):
            rows.append(
                {
                    "sound_class": f.sound_class,
                    "scope": f.label,
                    "false_alarms": f.rate.events,
                    "home_months": f.home_months,
                    "device_months": f.device_months,
                    "rate": f.rate.estimate,
                    "low": f.rate.low,
                    "high": f.rate.high,
                    "false_alarm_disturbances": f.disturbance_rate.events,
                    "disturbance_rate": f.disturbance_rate.estimate,
                    "disturbance_low": f.disturbance_rate.low,
                    "disturbance_high": f.disturbance_rate.high,
                    "open_disturbances": f.disturbances.pending + f.disturbances.unsure,
                    "unusable_disturbances": f.disturbances.unusable,
                    "home_level_low": f.home_rate.low,
                    "home_level_high": f.home_rate.high,
                    "home_level_reason": f.home_rate.reason,
                    "overdispersion": f.overdispersion.ratio,
                    "target": summary.target,
                    "readiness": f.readiness.state,
                    "readiness_reason": f.readiness.reason,
                    "upper_bound_none_open": f.readiness.high_none,
                    "upper_bound_all_open": f.readiness.high_all,
                    "open_alerts": f.alerts.pending + f.alerts.unsure,
                    "more_home_months": f.readiness.more_home_months,
                    "rule": f.readiness.rule,
                    "staged_events": f.detection.events,
                    "staged_detected": f.detection.detected,
                    "detected_share": f.detection.share.estimate,
                    "detected_low": f.detection.share.low,
                    "detected_high": f.detection.share.high,
                    "confirmed": f.alerts.confirmed,
                    "unsure": f.alerts.unsure,
                    "unusable": f.alerts.unusable,
                    "pending": f.alerts.pending,
                    "outside_monitored_time": f.alerts.outside_monitored_time,
                }
            )
            prefix = f"{f.sound_class}-{f.scope}"
            tables[f"{prefix}-homes"] = f.homes
            tables[f"{prefix}-causes"] = f.causes
            tables[f"{prefix}-grades"] = f.grades
            for b in f.breakdowns:
                tables[f"{prefix}-{b.dimension}"] = b.table
            tables[f"{prefix}-thresholds"] = f.whatif
            tables[f"{prefix}-missed-staged"] = f.detection.missed
        tables[f"{cs.sound_class}-trend"] = cs.trend
    tables["overview"] = pd.DataFrame(rows)
    tables["outside-monitored-time"] = summary.operations.outside_monitored_time
    return tables
