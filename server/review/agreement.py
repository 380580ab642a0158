"""Reviewer agreement and reviewer quality: pure functions over label sequences and frames.

No database, clock or environment: callers pass the labels, timestamps and ``now``.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Iterable, Sequence
from dataclasses import dataclass, replace
from datetime import datetime
from itertools import combinations
from typing import Any, Literal

import numpy as np
import pandas as pd
from scipy.stats import norm

Weights = Literal["linear", "quadratic"] | None


# --------------------------------------------------------------------------------------
# Two reviewers: percentage agreement and Cohen's kappa
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Agreement:
    """Share of items on which two reviewers gave the same label."""

    estimate: float
    agreed: int
    n: int
    reason: str | None = None


@dataclass(frozen=True)
class Kappa:
    """Cohen's kappa with the observed and chance agreement it came from."""

    estimate: float
    observed: float
    expected: float
    n: int
    weights: str | None = None
    reason: str | None = None
    # Large-sample interval (``kappa_interval``); NaN until one is attached.
    low: float = math.nan
    high: float = math.nan
    std_error: float = math.nan
    confidence_level: float | None = None
    method: str | None = None


@dataclass(frozen=True)
class ConfusionMatrix:
    """Counts of (first label, second label); rows are the first review, columns the second."""

    labels: tuple[Hashable, ...]
    counts: np.ndarray

    @property
    def n(self) -> int:
        return int(self.counts.sum())

    def as_rows(self) -> list[tuple[Hashable, list[int]]]:
        return [(lab, [int(c) for c in row]) for lab, row in zip(self.labels, self.counts, strict=True)]


def _check_pairs(first: Sequence[Hashable], second: Sequence[Hashable]) -> None:
    if len(first) != len(second):
        raise ValueError(f"label sequences differ in length: {len(first)} and {len(second)}")


def percent_agreement(first: Sequence[Hashable], second: Sequence[Hashable]) -> Agreement:
    """Proportion of paired items with identical labels; NaN (with a reason) when there are none."""
    _check_pairs(first, second)
    n = len(first)
    if n == 0:
        return Agreement(math.nan, 0, 0, reason="no double-reviewed items")
    agreed = sum(1 for a, b in zip(first, second, strict=True) if a == b)
    return Agreement(agreed / n, agreed, n)


def confusion_matrix(
    first: Sequence[Hashable], second: Sequence[Hashable], labels: Sequence[Hashable] | None = None
) -> ConfusionMatrix:
    """Cross-tabulate two label sequences.

    ``labels`` fixes the order (and may include labels nobody used); otherwise the labels
    that occur are sorted by their string form. A pair with a label outside ``labels`` is an error.
    """
    _check_pairs(first, second)
    if labels is None:
        labels = sorted(set(first) | set(second), key=str)
    index = {lab: i for i, lab in enumerate(labels)}
    if len(index) != len(labels):
        raise ValueError("labels must be distinct")
    counts = np.zeros((len(labels), len(labels)), dtype=np.int64)
    for a, b in zip(first, second, strict=True):
        try:
            counts[index[a], index[b]] += 1
        except KeyError as exc:
            raise ValueError(f"label {exc.args[0]!r} is not among the given labels") from None
    return ConfusionMatrix(tuple(labels), counts)


def cohen_kappa_from_table(table: Any, *, weights: Weights = None) -> Kappa:
    """Cohen's kappa from a square table of counts (rows reviewer A, columns reviewer B).

    kappa = (p_o - p_e) / (1 - p_e), with p_e from the product of the margins. With
    ``weights`` ("linear" or "quadratic", for ordered categories) the disagreement weight
    of cell (i, j) is |i - j| / (g - 1) or its square, and kappa_w = 1 - sum(w*O) / sum(w*E);
    ``observed`` and ``expected`` are then the weighted agreements 1 - sum(w*O)/N and 1 - sum(w*E)/N.

    References: Cohen J (1960), Educ Psychol Meas 20:37-46; Cohen J (1968), Psychol Bull
    70:213-220 for the weighted form.
    """
    t = np.asarray(table, dtype=float)
    if t.ndim != 2 or t.shape[0] != t.shape[1]:
        raise ValueError(f"table must be square, got shape {t.shape}")
    if (t < 0).any():
        raise ValueError("table counts must be non-negative")
    n_total = t.sum()
    n_int = int(round(n_total))
    if n_total == 0:
        return Kappa(math.nan, math.nan, math.nan, 0, weights, reason="no paired items")
    g = t.shape[0]
    p = t / n_total
    expected_table = np.outer(p.sum(axis=1), p.sum(axis=0))
    if weights is None:
        w = 1.0 - np.eye(g)
    else:
        if g < 2:
            w = np.zeros((g, g))
        else:
            i, j = np.indices((g, g))
            w = np.abs(i - j) / (g - 1)
            if weights == "quadratic":
                w = w**2
            elif weights != "linear":
                raise ValueError(f"unknown weights {weights!r}; use 'linear' or 'quadratic'")
    d_obs = float((w * p).sum())
    d_exp = float((w * expected_table).sum())
    observed, expected = 1.0 - d_obs, 1.0 - d_exp
    if d_exp == 0.0:
        return Kappa(
            math.nan,
            observed,
            expected,
            n_int,
            weights,
            reason="chance agreement is 1: both reviewers used a single, identical label",
        )
    return Kappa(1.0 - d_obs / d_exp, observed, expected, n_int, weights)


KAPPA_INTERVAL_METHOD = "fleiss-cohen-everitt"


def kappa_interval(table: Any, kappa: Kappa, confidence_level: float = 0.95) -> Kappa:
    """``kappa`` with a two-sided large-sample interval: estimate +/- z * SE.

    SE is the non-null large-sample standard error of unweighted kappa,
    var = (A + B - C) / ((1 - p_e)^2 N) with
    A = sum_i p_ii (1 - (p_i. + p_.i)(1 - k))^2,
    B = (1 - k)^2 sum_{i != j} p_ij (p_.i + p_j.)^2,
    C = (k - p_e (1 - k))^2.
    The interval is clipped to [-1, 1]. Weighted kappa and undefined kappa get no interval.

    References: Fleiss JL, Cohen J, Everitt BS (1969) "Large sample standard errors of kappa
    and weighted kappa", Psychol Bull 72:323-327 (citation from memory); the same formula is
    statsmodels' ``cohens_kappa(...).std_kappa``, against which the unit tests check it.
    """
    if not 0 < confidence_level < 1:
        raise ValueError("confidence_level must lie strictly between 0 and 1")
    if kappa.weights is not None or math.isnan(kappa.estimate):
        return kappa
    t = np.asarray(table, dtype=float)
    n = t.sum()
    p = t / n
    rows, cols = p.sum(axis=1), p.sum(axis=0)
    k, pe = kappa.estimate, kappa.expected
    a = float((np.diag(p) * (1 - (rows + cols) * (1 - k)) ** 2).sum())
    off = p * (cols[:, None] + rows[None, :]) ** 2
    np.fill_diagonal(off, 0.0)
    b = (1 - k) ** 2 * float(off.sum())
    c = (k - pe * (1 - k)) ** 2
    var = max(0.0, (a + b - c) / ((1 - pe) ** 2 * n))
    se = math.sqrt(var)
    z = float(norm.ppf(1 - (1 - confidence_level) / 2))
    return replace(
        kappa,
        low=max(-1.0, k - z * se),
        high=min(1.0, k + z * se),
        std_error=se,
        confidence_level=confidence_level,
        method=KAPPA_INTERVAL_METHOD,
    )


def cohen_kappa(
    first: Sequence[Hashable],
    second: Sequence[Hashable],
    *,
    labels: Sequence[Hashable] | None = None,
    weights: Weights = None,
) -> Kappa:
    """Cohen's kappa from paired labels (see ``cohen_kappa_from_table``)."""
    cm = confusion_matrix(first, second, labels)
    return cohen_kappa_from_table(cm.counts, weights=weights)


# --------------------------------------------------------------------------------------
# Any number of reviewers, missing values allowed: Krippendorff's alpha (nominal)
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Alpha:
    """Krippendorff's alpha with its observed and expected disagreement."""

    estimate: float
    observed_disagreement: float
    expected_disagreement: float
    n_pairable_values: int
    n_units: int
    reason: str | None = None


def _is_missing(v: Any) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def krippendorff_alpha_nominal(reliability_data: Iterable[Iterable[Any]]) -> Alpha:
    """Krippendorff's alpha for nominal data; rows are coders, columns units, None/NaN = missing.

    The coincidence matrix sums, over each unit u with m_u >= 2 values, every ordered pair of
    values from different coders with weight 1 / (m_u - 1); units with fewer than two values
    are not pairable and are dropped. With n_c the margins and n the pairable values,
    D_o = (n - sum_c o_cc) / n and D_e = (n^2 - sum_c n_c^2) / (n (n - 1)); alpha = 1 - D_o / D_e.
    The n - 1 in D_e is the small-sample correction that separates alpha from Scott's pi.

    References: Krippendorff K (2011) "Computing Krippendorff's Alpha-Reliability",
    Annenberg School for Communication, departmental paper 43.
    """
    rows = [list(r) for r in reliability_data]
    if not rows:
        return Alpha(math.nan, math.nan, math.nan, 0, 0, reason="no coders")
    n_units = len(rows[0])
    if any(len(r) != n_units for r in rows):
        raise ValueError("every coder row must have one entry per unit")
    values: dict[Any, int] = {}
    unit_counts: list[dict[int, int]] = []
    for u in range(n_units):
        counts: dict[int, int] = {}
        for r in rows:
            v = r[u]
            if _is_missing(v):
                continue
            code = values.setdefault(v, len(values))
            counts[code] = counts.get(code, 0) + 1
        unit_counts.append(counts)
    k = len(values)
    coincidence = np.zeros((k, k), dtype=float)
    pairable_units = 0
    for counts in unit_counts:
        m_u = sum(counts.values())
        if m_u < 2:
            continue
        pairable_units += 1
        vec = np.zeros(k)
        for code, c in counts.items():
            vec[code] = c
        coincidence += (np.outer(vec, vec) - np.diag(vec)) / (m_u - 1)
    return krippendorff_alpha_from_coincidence(coincidence, pairable_units)


def krippendorff_alpha_from_coincidence(coincidence: Any, pairable_units: int) -> Alpha:
    """Nominal alpha from a coincidence matrix (see ``krippendorff_alpha_nominal``) and its unit count.

    For units that each hold exactly two values (a first and a second review), the coincidence
    matrix is the confusion matrix plus its transpose, which spares the walk over units.
    """
    coincidence = np.asarray(coincidence, dtype=float)
    n = float(coincidence.sum())
    n_int = int(round(n))
    if pairable_units == 0:
        return Alpha(math.nan, math.nan, math.nan, 0, 0, reason="no unit has values from two or more coders")
    n_c = coincidence.sum(axis=1)
    d_obs = (n - float(np.trace(coincidence))) / n
    d_exp = (n * n - float((n_c**2).sum())) / (n * (n - 1))
    if d_exp == 0.0:
        return Alpha(
            math.nan,
            d_obs,
            d_exp,
            n_int,
            pairable_units,
            reason="every pairable value is the same label, so disagreement cannot be expected",
        )
    return Alpha(1.0 - d_obs / d_exp, d_obs, d_exp, n_int, pairable_units)


# --------------------------------------------------------------------------------------
# Three or more reviewers per clip: Fleiss' kappa
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FleissKappa:
    """Fleiss' kappa over clips that each had ``raters_min``..``raters_max`` reviewers."""

    estimate: float
    observed: float
    expected: float
    subjects: int
    ratings: int
    raters_min: int
    raters_max: int
    reason: str | None = None


def fleiss_kappa(table: Any) -> FleissKappa:
    """Fleiss' kappa from a subjects-by-categories table of counts (cell: raters choosing it).

    With n_i raters on subject i and n_ij of them choosing category j:
    P_i = (sum_j n_ij^2 - n_i) / (n_i (n_i - 1)), P_bar = mean of P_i,
    p_j = sum_i n_ij / sum_i n_i, P_e = sum_j p_j^2, kappa = (P_bar - P_e) / (1 - P_e).
    With every n_i equal this is exactly Fleiss (1971). When the number of raters varies, each
    subject's agreement uses its own n_i and the category shares pool all ratings (the usual
    generalisation); subjects with fewer than two ratings are dropped.

    References: Fleiss JL (1971) "Measuring nominal scale agreement among many raters",
    Psychol Bull 76:378-382.
    """
    t = np.asarray(table, dtype=float)
    if t.ndim != 2:
        raise ValueError(f"table must be subjects by categories, got shape {t.shape}")
    if (t < 0).any():
        raise ValueError("table counts must be non-negative")
    n_i = t.sum(axis=1)
    t = t[n_i >= 2]
    n_i = n_i[n_i >= 2]
    if t.shape[0] == 0:
        return FleissKappa(
            math.nan,
            math.nan,
            math.nan,
            0,
            0,
            0,
            0,
            reason="no clip has verdicts from three or more reviewers",
        )
    p_i = ((t * t).sum(axis=1) - n_i) / (n_i * (n_i - 1))
    observed = float(p_i.mean())
    p_j = t.sum(axis=0) / n_i.sum()
    expected = float((p_j * p_j).sum())
    shape = (int(t.shape[0]), int(n_i.sum()), int(n_i.min()), int(n_i.max()))
    if expected >= 1.0:
        return FleissKappa(
            math.nan, observed, expected, *shape, reason="every reviewer gave the same label to every clip"
        )
    return FleissKappa((observed - expected) / (1 - expected), observed, expected, *shape)


def rating_table(ratings: pd.DataFrame, labels: Sequence[Hashable], *, min_raters: int = 3) -> np.ndarray:
    """Subjects-by-labels counts for ``fleiss_kappa`` from one row per rating.

    ``ratings`` has columns ``unit``, ``rater``, ``label`` and a sortable ``order``; each rater
    counts once per unit (their earliest rating), and units with fewer than ``min_raters``
    raters are left out. Labels outside ``labels`` are an error.
    """
    if ratings.empty:
        return np.zeros((0, len(labels)), dtype=np.int64)
    index = {lab: i for i, lab in enumerate(labels)}
    unknown = set(ratings["label"]) - set(index)
    if unknown:
        raise ValueError(f"label {sorted(unknown, key=str)[0]!r} is not among the given labels")
    firsts = ratings.sort_values("order").drop_duplicates(["unit", "rater"], keep="first")
    rows: list[np.ndarray] = []
    for _, g in firsts.groupby("unit", sort=True):
        if len(g) < min_raters:
            continue
        row = np.zeros(len(labels), dtype=np.int64)
        for lab in g["label"]:
            row[index[lab]] += 1
        rows.append(row)
    if not rows:
        return np.zeros((0, len(labels)), dtype=np.int64)
    return np.vstack(rows)


# --------------------------------------------------------------------------------------
# From a verdict frame: pairs, pairwise kappa, alpha across everyone
# --------------------------------------------------------------------------------------

VERDICT_COLUMNS = ("alert_id", "reviewer_id", "label", "order")


@dataclass(frozen=True)
class PairKappa:
    """Cohen's kappa for one pair of reviewers over the items both reviewed."""

    reviewer_a: Hashable
    reviewer_b: Hashable
    shared: int
    kappa: Kappa
    agreement: Agreement


def paired_labels(verdicts: pd.DataFrame) -> tuple[list[Hashable], list[Hashable]]:
    """First and second label of every item with at least two verdicts.

    ``verdicts`` has one row per verdict with columns ``alert_id``, ``reviewer_id``,
    ``label`` and a sortable ``order`` (for example the verdict id or its time); the two
    earliest verdicts by different reviewers form the pair. Adjudications do not belong here.
    """
    first: list[Hashable] = []
    second: list[Hashable] = []
    if verdicts.empty:
        return first, second
    ordered = verdicts.sort_values(["alert_id", "order"])
    for _, group in ordered.groupby("alert_id", sort=True):
        seen: dict[Hashable, Hashable] = {}
        for reviewer, label in zip(group["reviewer_id"], group["label"], strict=True):
            if reviewer not in seen:
                seen[reviewer] = label
            if len(seen) == 2:
                break
        if len(seen) == 2:
            a, b = list(seen.values())
            first.append(a)
            second.append(b)
    return first, second


def pairwise_kappas(
    verdicts: pd.DataFrame, *, min_shared: int = 20, labels: Sequence[Hashable] | None = None
) -> list[PairKappa]:
    """Cohen's kappa for each reviewer pair with at least ``min_shared`` items in common.

    Within a pair, each reviewer's label is their first verdict on the item. Reviewer ids
    are ordered within the pair by their string form, so the result is deterministic.
    """
    if verdicts.empty:
        return []
    firsts = verdicts.sort_values("order").drop_duplicates(["alert_id", "reviewer_id"], keep="first")
    by_reviewer = {
        rid: dict(zip(g["alert_id"], g["label"], strict=True))
        for rid, g in firsts.groupby("reviewer_id", sort=False)
    }
    out: list[PairKappa] = []
    for a, b in combinations(sorted(by_reviewer, key=str), 2):
        shared_ids = sorted(set(by_reviewer[a]) & set(by_reviewer[b]), key=str)
        if len(shared_ids) < min_shared:
            continue
        la = [by_reviewer[a][i] for i in shared_ids]
        lb = [by_reviewer[b][i] for i in shared_ids]
        out.append(
            PairKappa(a, b, len(shared_ids), cohen_kappa(la, lb, labels=labels), percent_agreement(la, lb))
        )
    return out


def reliability_matrix(verdicts: pd.DataFrame) -> list[list[Any]]:
    """Coders-by-units matrix (None where a reviewer did not review an item) for alpha."""
    if verdicts.empty:
        return []
    firsts = verdicts.sort_values("order").drop_duplicates(["alert_id", "reviewer_id"], keep="first")
    reviewers = sorted(firsts["reviewer_id"].unique(), key=str)
    units = sorted(firsts["alert_id"].unique(), key=str)
    col = {u: j for j, u in enumerate(units)}
    row = {r: i for i, r in enumerate(reviewers)}
    matrix: list[list[Any]] = [[None] * len(units) for _ in reviewers]
    for a, r, lab in zip(firsts["alert_id"], firsts["reviewer_id"], firsts["label"], strict=True):
        matrix[row[r]][col[a]] = lab
    return matrix


# --------------------------------------------------------------------------------------
# Reviewer quality: gold checks, throughput, backlog
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Proportion:
    """A proportion with a two-sided interval."""

    estimate: float
    low: float
    high: float
    successes: int
    n: int
    confidence_level: float
    method: str
    reason: str | None = None


def wilson_interval(successes: int, n: int, confidence_level: float = 0.95) -> Proportion:
    """Wilson score interval for a binomial proportion, without continuity correction.

    Edge cases: n = 0 gives NaN with a reason; x = 0 gives a lower limit of exactly 0 and
    x = n an upper limit of exactly 1.

    References: Wilson EB (1927) J Am Stat Assoc 22:209-212; Newcombe RG (1998) Stat Med
    17:857-872 (method 3).
    """
    if n < 0 or successes < 0 or successes > n:
        raise ValueError(f"need 0 <= successes <= n, got {successes} of {n}")
    if not 0 < confidence_level < 1:
        raise ValueError("confidence_level must lie strictly between 0 and 1")
    if n == 0:
        return Proportion(
            math.nan, math.nan, math.nan, 0, 0, confidence_level, "wilson", reason="no gold checks answered"
        )
    z = float(norm.ppf(1 - (1 - confidence_level) / 2))
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == n else min(1.0, centre + half)
    return Proportion(p, low, high, successes, n, confidence_level, "wilson")


@dataclass(frozen=True)
class GoldAccuracy:
    reviewer_id: Hashable
    accuracy: Proportion


def gold_accuracy(answers: pd.DataFrame, *, confidence_level: float = 0.95) -> list[GoldAccuracy]:
    """Each reviewer's share of gold checks answered correctly, with a Wilson interval.

    ``answers`` has one row per gold check a reviewer answered, with columns
    ``reviewer_id`` and either a boolean ``correct`` or ``label`` (the reviewer's) and
    ``expected_label`` (the known answer). A reviewer with no answers does not appear.
    """
    out: list[GoldAccuracy] = []
    if answers.empty:
        return out
    for rid, g in answers.groupby("reviewer_id", sort=False):
        if "correct" in g:
            correct = int(g["correct"].astype(bool).sum())
        else:
            correct = int((g["label"] == g["expected_label"]).sum())
        out.append(GoldAccuracy(rid, wilson_interval(correct, len(g), confidence_level)))
    out.sort(key=lambda x: str(x.reviewer_id))
    return out


@dataclass(frozen=True)
class Throughput:
    """Clips per hour over active review time.

    Active review time is the sum of the gaps between a reviewer's consecutive verdicts
    that are no longer than ``idle_gap_s``; a longer gap is a break and is not counted.
    The clip that opens a stretch of work is not counted either (its handling time began
    before the first timestamp we have), so ``clips`` counts only verdicts whose handling
    time lies inside active time, and ``verdicts`` counts them all.
    """

    clips: int
    verdicts: int
    active_s: float
    idle_gap_s: float
    clips_per_hour: float
    reason: str | None = None


def throughput(decided_at: pd.DataFrame, *, idle_gap_s: float = 300.0) -> dict[Hashable, Throughput]:
    """Throughput per reviewer and overall (key ``None``) from verdict times.

    ``decided_at`` has columns ``reviewer_id`` and ``decided_at`` (aware datetimes).
    The overall figure pools counted clips and active time across reviewers.
    """
    if idle_gap_s <= 0:
        raise ValueError("idle_gap_s must be positive")
    result: dict[Hashable, Throughput] = {}
    total_clips = total_verdicts = 0
    total_active = 0.0
    if not decided_at.empty:
        for rid, g in decided_at.groupby("reviewer_id", sort=False):
            times = pd.to_datetime(g["decided_at"], utc=True).sort_values()
            gaps = times.diff().dt.total_seconds().to_numpy()[1:]
            within = gaps[gaps <= idle_gap_s]
            clips, active = int(within.size), float(within.sum())
            result[rid] = _throughput(clips, len(times), active, idle_gap_s)
            total_clips += clips
            total_verdicts += len(times)
            total_active += active
    result[None] = _throughput(total_clips, total_verdicts, total_active, idle_gap_s)
    return result


def _throughput(clips: int, verdicts: int, active_s: float, idle_gap_s: float) -> Throughput:
    if active_s <= 0:
        return Throughput(
            clips,
            verdicts,
            active_s,
            idle_gap_s,
            math.nan,
            reason="no active review time (fewer than two verdicts within the idle gap)",
        )
    return Throughput(clips, verdicts, active_s, idle_gap_s, clips / (active_s / 3600.0))


@dataclass(frozen=True)
class Backlog:
    """Alerts still waiting for a final verdict, and how long they have waited."""

    count: int
    oldest_age_s: float
    median_age_s: float
    reason: str | None = None


def backlog(received_at: Iterable[datetime], now: datetime) -> Backlog:
    """Count and age (from ``received_at`` to ``now``) of pending alerts; ages are NaN when none."""
    return backlog_of_ages([(now - t).total_seconds() for t in received_at])


def backlog_of_ages(ages_s: Iterable[float] | np.ndarray) -> Backlog:
    """Count, oldest and median of waiting times in seconds (see ``backlog``).

    An alert received after ``now`` (the server clock stepped back, or a summary for a moment in
    the past) has waited 0 s, never a negative time."""
    ages = np.maximum(np.asarray(ages_s, dtype=float), 0.0)
    if ages.size == 0:
        return Backlog(0, math.nan, math.nan, reason="nothing is waiting")
    return Backlog(int(ages.size), float(ages.max()), float(np.median(ages)))
