"""Agreement maths against published worked examples and reference libraries."""

from __future__ import annotations

import datetime as dt
import math

import krippendorff
import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score

from server.review import agreement as ag

# Tolerance rule from reference/checks.md: half a unit in the last printed digit.
HALF_3DP = 0.0005
HALF_2DP = 0.005


def _expand(table: list[list[int]]) -> tuple[list[int], list[int]]:
    a: list[int] = []
    b: list[int] = []
    for i, row in enumerate(table):
        for j, c in enumerate(row):
            a += [i] * c
            b += [j] * c
    return a, b


# ---------------------------------------------------------------- Cohen's kappa, published tables

# Cohen J (1960) Educ Psychol Meas 20:37-46, Table 2b, N = 200 (figures from memory; full
# precision 0.491525 recomputed in checks.md section 5).
COHEN_1960_2B = [[88, 14, 18], [10, 40, 10], [2, 6, 12]]
# Altman DG (1991) Practical Statistics for Medical Research, section 14.3, Table 14.2.
ALTMAN_14_2 = [[21, 12, 0, 0], [4, 17, 1, 0], [3, 9, 15, 2], [0, 0, 0, 1]]
# Altman DG (1991), Table 14.4(a), the prevalence example.
ALTMAN_14_4A = [[70, 10], [10, 10]]


def test_cohen_1960_table_2b_published_figures() -> None:
    k = ag.cohen_kappa_from_table(COHEN_1960_2B)
    # Cohen (1960) Table 2b: p_o 0.70, p_c 0.41, kappa 0.492.
    assert abs(k.observed - 0.70) <= HALF_2DP
    assert abs(k.expected - 0.41) <= HALF_2DP
    assert abs(k.estimate - 0.492) <= HALF_3DP
    assert k.estimate == pytest.approx(0.491525, abs=5e-7)  # full precision, checks.md section 5
    assert k.n == 200


def test_altman_table_14_2_unweighted_and_linear() -> None:
    # Altman (1991) Table 14.2: kappa 0.47, linearly weighted kappa 0.57.
    k = ag.cohen_kappa_from_table(ALTMAN_14_2)
    kw = ag.cohen_kappa_from_table(ALTMAN_14_2, weights="linear")
    assert abs(k.estimate - 0.47) <= HALF_2DP
    assert abs(kw.estimate - 0.57) <= HALF_2DP
    assert k.estimate == pytest.approx(0.472789, abs=5e-7)
    assert kw.estimate == pytest.approx(0.568399, abs=5e-7)
    assert k.n == 85


def test_altman_table_14_4a_prevalence_example() -> None:
    # Altman (1991) Table 14.4(a): kappa 0.38, exactly 0.375.
    k = ag.cohen_kappa_from_table(ALTMAN_14_4A)
    assert k.estimate == pytest.approx(0.375, abs=1e-12)
    assert k.observed == pytest.approx(0.80)


def test_house_style_two_reviewer_example() -> None:
    # STYLE.md reference table (Cohen 1960 definition, worked by hand): 40 both true,
    # 45 both false, 5 + 10 split -> 0.70.
    first = ["confirmed"] * 40 + ["false_alarm"] * 45 + ["confirmed"] * 5 + ["false_alarm"] * 10
    second = ["confirmed"] * 40 + ["false_alarm"] * 45 + ["false_alarm"] * 5 + ["confirmed"] * 10
    assert ag.cohen_kappa(first, second).estimate == pytest.approx(0.70, abs=1e-12)


@pytest.mark.parametrize("table", [COHEN_1960_2B, ALTMAN_14_2, ALTMAN_14_4A])
def test_kappa_from_labels_equals_kappa_from_table(table: list[list[int]]) -> None:
    a, b = _expand(table)
    labels = list(range(len(table)))
    assert ag.cohen_kappa(a, b, labels=labels).estimate == pytest.approx(
        ag.cohen_kappa_from_table(table).estimate, abs=1e-12
    )


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("weights", [None, "linear", "quadratic"])
def test_kappa_matches_scikit_learn_on_random_labels(seed: int, weights: str | None) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(20, 300))
    k = int(rng.integers(2, 6))
    a = rng.integers(0, k, n)
    # Second reviewer copies the first most of the time, so kappa is far from 0.
    b = np.where(rng.random(n) < 0.6, a, rng.integers(0, k, n))
    ours = ag.cohen_kappa(a.tolist(), b.tolist(), labels=list(range(k)), weights=weights)  # type: ignore[arg-type]
    ref = cohen_kappa_score(a, b, labels=list(range(k)), weights=weights)
    assert ours.estimate == pytest.approx(ref, abs=1e-12)


def test_kappa_undefined_when_both_use_one_label() -> None:
    k = ag.cohen_kappa(["confirmed"] * 5, ["confirmed"] * 5)
    assert math.isnan(k.estimate)
    assert k.reason is not None and "single" in k.reason
    assert k.observed == 1.0


def test_kappa_of_empty_input_is_nan_with_reason() -> None:
    k = ag.cohen_kappa([], [])
    assert math.isnan(k.estimate) and k.n == 0 and k.reason


def test_kappa_rejects_non_square_table_and_unequal_lengths() -> None:
    with pytest.raises(ValueError):
        ag.cohen_kappa_from_table([[1, 2, 3], [4, 5, 6]])
    with pytest.raises(ValueError):
        ag.cohen_kappa([1, 2], [1])


# ---------------------------------------------------------------- percentage agreement, confusion


def test_percent_agreement_counts_matches() -> None:
    r = ag.percent_agreement(["a", "b", "a", "c"], ["a", "a", "a", "c"])
    assert (r.agreed, r.n) == (3, 4)
    assert r.estimate == 0.75


def test_percent_agreement_matches_table_diagonal() -> None:
    a, b = _expand(COHEN_1960_2B)
    assert ag.percent_agreement(a, b).estimate == pytest.approx(140 / 200)


def test_percent_agreement_empty_is_nan() -> None:
    r = ag.percent_agreement([], [])
    assert math.isnan(r.estimate) and r.reason


def test_confusion_matrix_rebuilds_published_table() -> None:
    a, b = _expand(ALTMAN_14_2)
    cm = ag.confusion_matrix(a, b, labels=[0, 1, 2, 3])
    assert cm.counts.tolist() == ALTMAN_14_2
    assert cm.n == 85


def test_confusion_matrix_keeps_given_order_and_unused_labels() -> None:
    cm = ag.confusion_matrix(
        ["false_alarm", "confirmed"],
        ["false_alarm", "unsure"],
        labels=["confirmed", "false_alarm", "unsure", "unusable"],
    )
    assert cm.labels == ("confirmed", "false_alarm", "unsure", "unusable")
    assert cm.counts.tolist() == [[0, 0, 1, 0], [0, 1, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]
    with pytest.raises(ValueError):
        ag.confusion_matrix(["x"], ["confirmed"], labels=["confirmed"])


# ---------------------------------------------------------------- Krippendorff's alpha

N = None


def test_krippendorff_2011_section_a_binary_two_coders() -> None:
    # Krippendorff (2011) "Computing Krippendorff's Alpha-Reliability", section A: alpha 0.095.
    data = [[0, 1, 0, 0, 0, 0, 0, 0, 1, 0], [1, 1, 1, 0, 0, 1, 0, 0, 0, 0]]
    a = ag.krippendorff_alpha_nominal(data)
    assert abs(a.estimate - 0.095) <= HALF_3DP
    assert a.estimate == pytest.approx(1 - 19 * 4 / (14 * 6), abs=1e-12)  # derived form, checks.md


def test_krippendorff_2011_section_c_nominal_missing_values() -> None:
    # Krippendorff (2011), section C: four coders, twelve units, missing values; alpha 0.743.
    data = [
        [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
        [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
        [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
        [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
    ]
    a = ag.krippendorff_alpha_nominal(data)
    assert abs(a.estimate - 0.743) <= HALF_3DP
    assert a.estimate == pytest.approx(0.743421, abs=5e-7)
    # Unit 12 holds a single value: not pairable, so 11 units and 40 pairable values remain.
    assert a.n_units == 11
    assert a.n_pairable_values == 40


def test_alpha_is_unchanged_when_lone_value_moves_coder() -> None:
    # checks.md section 7: putting unit 12's single value under coder C gives the same alpha.
    data_b = [
        [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
        [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
        [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
        [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
    ]
    data_c = [row[:] for row in data_b]
    data_c[1][11], data_c[2][11] = N, 3
    assert ag.krippendorff_alpha_nominal(data_b).estimate == pytest.approx(
        ag.krippendorff_alpha_nominal(data_c).estimate, abs=1e-15
    )


def test_alpha_accepts_string_labels_and_nan_missing() -> None:
    words = {1: "confirmed", 2: "false_alarm", 3: "unsure", 4: "unusable", 5: "other"}
    data = [
        [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
        [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
        [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
        [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
    ]
    as_words = [[words[v] if v is not None else math.nan for v in row] for row in data]
    assert ag.krippendorff_alpha_nominal(as_words).estimate == pytest.approx(0.743421, abs=5e-7)


@pytest.mark.parametrize("seed", range(10))
def test_alpha_matches_krippendorff_package_on_random_data(seed: int) -> None:
    rng = np.random.default_rng(1000 + seed)
    coders = int(rng.integers(2, 6))
    units = int(rng.integers(10, 80))
    k = int(rng.integers(2, 5))
    truth = rng.integers(0, k, units)
    noise = rng.integers(0, k, (coders, units))
    data = np.where(rng.random((coders, units)) < 0.7, truth, noise).astype(float)
    data[rng.random((coders, units)) < 0.3] = np.nan
    ours = ag.krippendorff_alpha_nominal(data.tolist())
    ref = krippendorff.alpha(reliability_data=data, level_of_measurement="nominal")
    assert ours.estimate == pytest.approx(ref, abs=1e-12)


def test_alpha_for_two_coders_without_missing_is_close_to_cohen() -> None:
    # Property (common practice): alpha and kappa differ only by the chance model and the
    # n/(n-1) correction, so on 200 items they sit within a few thousandths.
    a, b = _expand(COHEN_1960_2B)
    alpha = ag.krippendorff_alpha_nominal([a, b]).estimate
    kappa = ag.cohen_kappa(a, b).estimate
    assert abs(alpha - kappa) < 0.02
    assert alpha != kappa


def test_alpha_undefined_cases_have_reasons() -> None:
    no_pairs = ag.krippendorff_alpha_nominal([[1, N], [N, 2]])
    assert math.isnan(no_pairs.estimate) and "two or more" in (no_pairs.reason or "")
    same = ag.krippendorff_alpha_nominal([[1, 1, 1], [1, 1, 1]])
    assert math.isnan(same.estimate) and same.reason
    assert same.observed_disagreement == 0.0


@pytest.mark.parametrize("seed", range(5))
def test_alpha_from_pairs_coincidence_equals_alpha_from_units(seed: int) -> None:
    # Units with exactly two values: the coincidence matrix is the confusion matrix plus its transpose.
    rng = np.random.default_rng(2000 + seed)
    labels = ["confirmed", "false_alarm", "unsure", "unusable"]
    first = [labels[i] for i in rng.integers(0, 4, 40)]
    second = [x if rng.random() < 0.6 else labels[int(rng.integers(0, 4))] for x in first]
    counts = ag.confusion_matrix(first, second, labels=labels).counts
    assert ag.krippendorff_alpha_from_coincidence(counts + counts.T, len(first)) == (
        ag.krippendorff_alpha_nominal([first, second])
    )


def test_perfect_agreement_gives_alpha_one() -> None:
    assert ag.krippendorff_alpha_nominal([[1, 2, 3, N], [1, 2, 3, 3]]).estimate == pytest.approx(1.0)


# ---------------------------------------------------------------- from a verdict frame


def _frame(rows: list[tuple[int, int, str]]) -> pd.DataFrame:
    return pd.DataFrame(
        [{"alert_id": a, "reviewer_id": r, "label": lab, "order": i} for i, (a, r, lab) in enumerate(rows)]
    )


def test_paired_labels_takes_first_two_distinct_reviewers() -> None:
    frame = _frame(
        [
            (1, 10, "confirmed"),
            (1, 11, "false_alarm"),
            (1, 12, "confirmed"),
            (2, 10, "unsure"),
            (3, 11, "confirmed"),
            (3, 11, "false_alarm"),
            (3, 12, "confirmed"),
        ]
    )
    first, second = ag.paired_labels(frame)
    # Alert 2 has one verdict; alert 3's repeat by reviewer 11 is not a second reviewer.
    assert first == ["confirmed", "confirmed"]
    assert second == ["false_alarm", "confirmed"]


def test_pairwise_kappas_only_for_pairs_with_enough_shared_items() -> None:
    rng = np.random.default_rng(7)
    labels = ["confirmed", "false_alarm", "unsure"]
    rows = []
    for alert in range(30):  # reviewers 1 and 2 share 30 items
        x = labels[int(rng.integers(0, 3))]
        y = x if rng.random() < 0.7 else labels[int(rng.integers(0, 3))]
        rows += [(alert, 1, x), (alert, 2, y)]
    for alert in range(100, 110):  # reviewers 1 and 3 share only 10
        rows += [(alert, 1, "confirmed"), (alert, 3, "confirmed")]
    frame = _frame(rows)
    pairs = ag.pairwise_kappas(frame, min_shared=20)
    assert [(p.reviewer_a, p.reviewer_b, p.shared) for p in pairs] == [(1, 2, 30)]
    a = [lab for (al, r, lab) in rows if r == 1 and al < 100]
    b = [lab for (al, r, lab) in rows if r == 2]
    assert pairs[0].kappa.estimate == pytest.approx(cohen_kappa_score(a, b), abs=1e-12)
    assert len(ag.pairwise_kappas(frame, min_shared=10)) == 2


def test_reliability_matrix_feeds_alpha() -> None:
    frame = _frame(
        [
            (1, 10, "confirmed"),
            (1, 11, "confirmed"),
            (2, 10, "false_alarm"),
            (2, 11, "unsure"),
            (3, 11, "unsure"),
        ]
    )
    m = ag.reliability_matrix(frame)
    assert m == [["confirmed", "false_alarm", None], ["confirmed", "unsure", "unsure"]]
    codes = {"confirmed": 0, "false_alarm": 1, "unsure": 2}
    numeric = np.array([[codes[v] if v else np.nan for v in row] for row in m], dtype=float)
    ref = krippendorff.alpha(reliability_data=numeric, level_of_measurement="nominal")
    assert ag.krippendorff_alpha_nominal(m).estimate == pytest.approx(ref, abs=1e-12)


# ---------------------------------------------------------------- gold accuracy (Wilson)


def test_wilson_interval_newcombe_1998_table_1() -> None:
    # Newcombe (1998) Stat Med 17:857-872, Table I, method 3 (Wilson): 81/263 -> 0.2553, 0.3662.
    p = ag.wilson_interval(81, 263)
    assert abs(p.low - 0.2553) <= 0.00005 and abs(p.high - 0.3662) <= 0.00005
    assert p.low == pytest.approx(0.255289, abs=5e-7) and p.high == pytest.approx(0.366210, abs=5e-7)
    # Same table: 0/20 -> 0.0000, 0.1611, with the lower limit exactly 0.
    z = ag.wilson_interval(0, 20)
    assert z.low == 0.0 and z.high == pytest.approx(0.161125, abs=5e-7)


def test_wilson_interval_house_style_value_and_edges() -> None:
    # STYLE.md reference table, recomputed from Wilson's 1927 formula: 7 of 50 -> 0.0695-0.2619.
    p = ag.wilson_interval(7, 50)
    assert abs(p.low - 0.0695) <= 0.00005 and abs(p.high - 0.2619) <= 0.00005
    full = ag.wilson_interval(20, 20)
    assert full.high == 1.0 and full.low < 1.0
    none = ag.wilson_interval(0, 0)
    assert math.isnan(none.estimate) and none.reason
    assert ag.wilson_interval(7, 50, 0.99).low < p.low  # widens with the confidence level


def test_gold_accuracy_per_reviewer() -> None:
    answers = pd.DataFrame(
        {
            "reviewer_id": [1, 1, 1, 1, 2, 2],
            "label": ["confirmed", "false_alarm", "confirmed", "unsure", "confirmed", "confirmed"],
            "expected_label": [
                "confirmed",
                "false_alarm",
                "false_alarm",
                "confirmed",
                "confirmed",
                "confirmed",
            ],
        }
    )
    res = {g.reviewer_id: g.accuracy for g in ag.gold_accuracy(answers)}
    assert (res[1].successes, res[1].n, res[1].estimate) == (2, 4, 0.5)
    assert (res[2].successes, res[2].n) == (2, 2)
    assert res[2].high == 1.0 and res[1].method == "wilson"
    assert res[1].low <= 0.5 <= res[1].high
    # A stored ``correct`` column (label and cause both judged) takes precedence.
    answers["correct"] = [True, True, True, True, False, True]
    res = {g.reviewer_id: g.accuracy for g in ag.gold_accuracy(answers)}
    assert (res[1].successes, res[2].successes) == (4, 1)


# ---------------------------------------------------------------- throughput and backlog

T0 = dt.datetime(2031, 3, 3, 9, 0, tzinfo=dt.UTC)


def test_throughput_counts_gaps_within_idle_limit() -> None:
    times = [T0 + dt.timedelta(seconds=s) for s in (0, 30, 60, 90, 2000, 2040)]
    frame = pd.DataFrame({"reviewer_id": [5] * 6, "decided_at": times})
    t = ag.throughput(frame, idle_gap_s=300)[5]
    # Gaps 30, 30, 30 and 40 s are work; the 1910 s gap is a break. The clip that opens
    # each stretch is not counted, so 4 of the 6 verdicts count.
    assert t.clips == 4 and t.verdicts == 6
    assert t.active_s == pytest.approx(130.0)
    assert t.clips_per_hour == pytest.approx(4 / (130 / 3600))


def test_throughput_overall_pools_reviewers_and_handles_no_activity() -> None:
    frame = pd.DataFrame(
        {
            "reviewer_id": [1, 1, 1, 2],
            "decided_at": [T0, T0 + dt.timedelta(seconds=60), T0 + dt.timedelta(seconds=120), T0],
        }
    )
    res = ag.throughput(frame)
    assert res[None].clips == 2 and res[None].active_s == pytest.approx(120.0)
    assert res[None].clips_per_hour == pytest.approx(60.0)
    assert math.isnan(res[2].clips_per_hour) and res[2].reason
    empty = ag.throughput(pd.DataFrame(columns=["reviewer_id", "decided_at"]))
    assert list(empty) == [None] and math.isnan(empty[None].clips_per_hour)


def test_backlog_count_and_age() -> None:
    now = T0 + dt.timedelta(hours=10)
    b = ag.backlog([T0, T0 + dt.timedelta(hours=8), T0 + dt.timedelta(hours=9)], now)
    assert b.count == 3
    assert b.oldest_age_s == pytest.approx(36000.0)
    assert b.median_age_s == pytest.approx(7200.0)
    e = ag.backlog([], now)
    assert e.count == 0 and math.isnan(e.oldest_age_s) and e.reason


def test_backlog_ages_are_never_negative() -> None:
    # Received after "now" (clock stepped back): waited 0 s. Ages 0, 0, 3600 -> oldest 3600, median 0.
    now = T0
    b = ag.backlog(
        [T0 + dt.timedelta(hours=2), T0 + dt.timedelta(seconds=1), T0 - dt.timedelta(hours=1)], now
    )
    assert (b.count, b.oldest_age_s, b.median_age_s) == (3, 3600.0, 0.0)


def test_backlog_of_ages_is_the_backlog() -> None:
    now = T0 + dt.timedelta(days=2, microseconds=7)
    received = [T0 + dt.timedelta(hours=h, microseconds=us) for h, us in ((1, 3), (8, 0), (30, 999_999))]
    ages = [(now - t).total_seconds() for t in received]
    assert ag.backlog_of_ages(np.array(ages)) == ag.backlog(received, now)
    assert ag.backlog_of_ages([]).reason == ag.backlog([], now).reason


# ---------------------------------------------------------------- Cohen's kappa: the interval


def test_kappa_interval_matches_statsmodels_on_altman_table_14_2() -> None:
    # Reference: statsmodels.stats.inter_rater.cohens_kappa (std_kappa, kappa_low, kappa_upp),
    # the large-sample SE of Fleiss, Cohen & Everitt (1969) (citation from memory). Altman's own
    # interval for this table is not used: checks.md section 5 explains why it does not reproduce.
    from statsmodels.stats.inter_rater import cohens_kappa

    k = ag.kappa_interval(ALTMAN_14_2, ag.cohen_kappa_from_table(ALTMAN_14_2))
    ref = cohens_kappa(np.asarray(ALTMAN_14_2))
    assert k.estimate == pytest.approx(ref.kappa, abs=1e-12)
    assert k.std_error == pytest.approx(ref.std_kappa, abs=1e-12)
    assert (k.low, k.high) == pytest.approx((ref.kappa_low, ref.kappa_upp), abs=1e-12)
    assert k.confidence_level == 0.95 and k.method == ag.KAPPA_INTERVAL_METHOD


@pytest.mark.parametrize("seed", [3, 17, 29])
def test_kappa_interval_matches_statsmodels_on_random_tables(seed: int) -> None:
    # Reference: statsmodels cohens_kappa, as above.
    from statsmodels.stats.inter_rater import cohens_kappa

    rng = np.random.default_rng(seed)
    table = rng.integers(0, 40, size=(4, 4)) + np.diag(rng.integers(20, 80, size=4))
    k = ag.kappa_interval(table, ag.cohen_kappa_from_table(table))
    ref = cohens_kappa(table)
    assert k.std_error == pytest.approx(ref.std_kappa, rel=1e-10)
    assert (k.low, k.high) == pytest.approx((ref.kappa_low, ref.kappa_upp), abs=1e-10)


def test_kappa_interval_contains_estimate_and_widens_with_level() -> None:
    base = ag.cohen_kappa_from_table(COHEN_1960_2B)
    k90, k95, k99 = (ag.kappa_interval(COHEN_1960_2B, base, c) for c in (0.90, 0.95, 0.99))
    for k in (k90, k95, k99):
        assert k.low < k.estimate < k.high
    assert k99.low < k95.low < k90.low and k90.high < k95.high < k99.high
    # Half-width is z * SE: the 95% one is 1.959964 standard errors.
    assert (k95.high - k95.low) / 2 == pytest.approx(1.959964 * k95.std_error, abs=1e-6)


def test_kappa_interval_absent_for_weighted_or_undefined_kappa() -> None:
    weighted = ag.cohen_kappa_from_table(ALTMAN_14_2, weights="linear")
    assert math.isnan(ag.kappa_interval(ALTMAN_14_2, weighted).low)
    empty = ag.cohen_kappa_from_table([[0, 0], [0, 0]])
    out = ag.kappa_interval([[0, 0], [0, 0]], empty)
    assert math.isnan(out.low) and out.reason == empty.reason
    with pytest.raises(ValueError):
        ag.kappa_interval(ALTMAN_14_4A, ag.cohen_kappa_from_table(ALTMAN_14_4A), 1.0)


def test_kappa_interval_clipped_at_one_for_near_perfect_agreement() -> None:
    table = [[30, 0], [1, 3]]
    k = ag.kappa_interval(table, ag.cohen_kappa_from_table(table))
    assert k.high == 1.0 and k.low < k.estimate


# ---------------------------------------------------------------- Fleiss' kappa

# Worked example of the Wikipedia article "Fleiss' kappa" (a secondary source; 10 subjects,
# 14 raters each, 5 categories), as transcribed in reference/checks.md section 6. Fleiss (1971)
# has its own example (30 patients, 6 psychiatrists, 5 diagnoses, kappa about 0.43: from memory);
# its table was not to hand, so it is not used here.
WIKI_FLEISS = [
    [0, 0, 0, 0, 14],
    [0, 2, 6, 4, 2],
    [0, 0, 3, 5, 6],
    [0, 3, 9, 2, 0],
    [2, 2, 8, 1, 1],
    [7, 7, 0, 0, 0],
    [3, 2, 6, 3, 0],
    [2, 5, 3, 2, 2],
    [6, 5, 2, 1, 0],
    [0, 2, 2, 3, 7],
]


def test_fleiss_kappa_worked_example() -> None:
    f = ag.fleiss_kappa(WIKI_FLEISS)
    # Published: mean agreement 0.378, chance agreement 0.213, kappa 0.210 (checks.md section 6).
    assert abs(f.observed - 0.378) <= HALF_3DP
    assert abs(f.expected - 0.213) <= HALF_3DP
    assert abs(f.estimate - 0.210) <= HALF_3DP
    assert f.estimate == pytest.approx(0.209931, abs=5e-7)
    assert (f.subjects, f.ratings, f.raters_min, f.raters_max) == (10, 140, 14, 14)


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_fleiss_kappa_matches_statsmodels_with_equal_raters(seed: int) -> None:
    # Reference: statsmodels.stats.inter_rater.fleiss_kappa (Fleiss 1971), equal raters per subject.
    from statsmodels.stats.inter_rater import aggregate_raters, fleiss_kappa

    rng = np.random.default_rng(seed)
    truth = rng.integers(0, 3, size=40)
    ratings = np.where(rng.random((40, 5)) < 0.7, truth[:, None], rng.integers(0, 3, size=(40, 5)))
    table, _ = aggregate_raters(ratings, n_cat=3)
    assert ag.fleiss_kappa(table).estimate == pytest.approx(fleiss_kappa(table), abs=1e-12)


def test_fleiss_kappa_with_unequal_raters_by_hand() -> None:
    # Three subjects: 3 raters (2 A, 1 B), 4 raters (4 A), 3 raters (1 A, 1 B, 1 C).
    # P_i = (4+1-3)/6 = 1/3, (16-4)/12 = 1, (3-3)/6 = 0 -> P_bar = 4/9.
    # p = (7, 2, 1) / 10 -> P_e = 0.54; kappa = (4/9 - 0.54) / 0.46.
    f = ag.fleiss_kappa([[2, 1, 0], [4, 0, 0], [1, 1, 1]])
    assert f.observed == pytest.approx(4 / 9, abs=1e-12)
    assert f.expected == pytest.approx(0.54, abs=1e-12)
    assert f.estimate == pytest.approx((4 / 9 - 0.54) / 0.46, abs=1e-12)
    assert (f.raters_min, f.raters_max, f.ratings) == (3, 4, 10)


def test_fleiss_kappa_edge_cases() -> None:
    none = ag.fleiss_kappa(np.zeros((0, 3)))
    assert math.isnan(none.estimate) and none.reason and none.subjects == 0
    lone = ag.fleiss_kappa([[1, 0], [0, 1]])  # single ratings are not pairable
    assert lone.subjects == 0 and math.isnan(lone.estimate)
    same = ag.fleiss_kappa([[3, 0], [3, 0]])
    assert math.isnan(same.estimate) and same.reason and same.observed == 1.0
    with pytest.raises(ValueError):
        ag.fleiss_kappa([[1, -1]])


def test_rating_table_counts_each_reviewer_once_and_drops_small_units() -> None:
    ratings = pd.DataFrame(
        {
            "unit": [1, 1, 1, 1, 2, 2, 3, 3, 3],
            "rater": ["a", "b", "c", "a", "a", "b", "a", "b", "c"],
            "label": ["x", "y", "x", "y", "x", "x", "z", "z", "y"],
            "order": [1, 2, 3, 4, 5, 6, 7, 8, 9],
        }
    )
    table = ag.rating_table(ratings, ["x", "y", "z"], min_raters=3)
    # Unit 1: a's first label x (the later y is ignored), b y, c x; unit 2 has two raters only.
    assert table.tolist() == [[2, 1, 0], [0, 1, 2]]
    assert ag.rating_table(ratings.iloc[:0], ["x"]).shape == (0, 1)
    with pytest.raises(ValueError):
        ag.rating_table(ratings, ["x", "y"])


# ---------------------------------------------------------------- seeded simulation: which sample

LAB_CONFIRMED, LAB_FALSE, LAB_UNSURE = 0, 1, 2
# Invented model: four reviewers who are right this often on an easy clip.
EASY_ACCURACY = np.array([0.98, 0.96, 0.94, 0.91])


def _label_probabilities(truth: np.ndarray, difficulty: np.ndarray, reviewer: int) -> np.ndarray:
    """P(confirmed, false alarm, unsure) for one reviewer on each clip: (n, 3)."""
    p_unsure = 0.01 + 0.9 * difficulty**2  # harder clips: more often unsure (about 7% overall)
    acc = 0.5 + (EASY_ACCURACY[reviewer] - 0.5) * (1 - difficulty**2)  # coin toss at the hardest
    right = (1 - p_unsure) * acc
    wrong = (1 - p_unsure) * (1 - acc)
    out = np.empty((truth.size, 3))
    out[:, LAB_CONFIRMED] = np.where(truth == LAB_CONFIRMED, right, wrong)
    out[:, LAB_FALSE] = np.where(truth == LAB_FALSE, right, wrong)
    out[:, LAB_UNSURE] = p_unsure
    return out


def _clips(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    truth = np.where(rng.random(n) < 0.35, LAB_CONFIRMED, LAB_FALSE)
    return truth, rng.beta(1.0, 4.0, size=n)  # most clips easy, a few hard


def _model_kappa() -> float:
    """Kappa of first against second review over every clip: exact given each clip's truth and
    difficulty, averaged over all ordered reviewer pairs and 400 000 model clips."""
    truth, difficulty = _clips(np.random.default_rng(20261203), 400_000)
    probs = [_label_probabilities(truth, difficulty, r) for r in range(len(EASY_ACCURACY))]
    table = np.zeros((3, 3))
    pairs = [(a, b) for a in range(len(probs)) for b in range(len(probs)) if a != b]
    for a, b in pairs:
        table += np.einsum("ni,nj->ij", probs[a], probs[b])
    return ag.cohen_kappa_from_table(table / len(pairs)).estimate


def _draw(rng: np.random.Generator, p: np.ndarray) -> np.ndarray:
    return (rng.random(p.shape[0])[:, None] > np.cumsum(p, axis=1)).sum(axis=1)


def _one_pilot(rng: np.random.Generator, n: int, share: float) -> tuple[float, float, int, int]:
    truth, difficulty = _clips(rng, n)
    first_r = rng.integers(0, 4, size=n)
    second_r = (first_r + rng.integers(1, 4, size=n)) % 4  # someone else
    probs = np.stack([_label_probabilities(truth, difficulty, r) for r in range(4)])
    idx = np.arange(n)
    first = _draw(rng, probs[first_r, idx])
    second = _draw(rng, probs[second_r, idx])
    drawn = rng.random(n) < share  # the keyed draw: independent of the clip
    pooled = drawn | (first == LAB_UNSURE)  # every unsure first verdict also gets a second review

    def kappa(mask: np.ndarray) -> float:
        table = np.bincount(first[mask] * 3 + second[mask], minlength=9).reshape(3, 3)
        return ag.cohen_kappa_from_table(table).estimate

    return kappa(drawn), kappa(pooled), int(drawn.sum()), int(pooled.sum())


def test_random_sample_recovers_model_kappa_while_pooling_unsure_biases_it() -> None:
    target = _model_kappa()
    rng = np.random.default_rng(11)
    runs = np.array([_one_pilot(rng, 3000, 0.10) for _ in range(300)])
    random_k, pooled_k = runs[:, 0], runs[:, 1]
    mc_se = random_k.std(ddof=1) / math.sqrt(len(random_k))
    # Recovered within Monte Carlo tolerance (4 standard errors of the mean, plus 0.005 for the
    # ratio estimator's small-sample bias at about 300 pairs per pilot).
    assert abs(random_k.mean() - target) < 4 * mc_se + 0.005
    # Pooling every unsure first verdict with the draw drags kappa far below the model's value.
    assert pooled_k.mean() < target - 0.15
    assert (pooled_k < random_k).mean() > 0.95
    assert 0.4 < target < 0.8  # a plausible reviewer agreement for this model
    assert runs[:, 3].mean() > 1.5 * runs[:, 2].mean()  # the unsure clips are a large share of the pool
