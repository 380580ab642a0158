"""Threshold what-if: raising the threshold, never lowering it."""

from __future__ import annotations

import numpy as np
import pytest

from server.analytics import rates, whatif


def test_score_floor_is_the_highest_lowest_score():
    assert whatif.score_floor([0.5, 0.62, 0.55]) == pytest.approx(0.62)
    assert np.isnan(whatif.score_floor([]))


def test_grid_starts_at_the_floor():
    g = whatif.threshold_grid(0.613, step=0.05)
    assert g[0] == pytest.approx(0.613)
    assert g[1:].tolist() == pytest.approx([0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95, 1.0])
    assert whatif.threshold_grid(float("nan")).size == 0


def test_counts_and_detection_at_thresholds_match_brute_force():
    rng = np.random.default_rng(2)
    fa = rng.uniform(0.6, 1.0, size=300)
    best = np.concatenate([rng.uniform(0.6, 1.0, size=40), [np.nan] * 5])
    grid = whatif.threshold_grid(0.6, step=0.05)
    table = whatif.at_thresholds(fa, 120.0, best, grid, floor=0.6, target=1.0)
    for row in table.itertuples():
        assert row.false_alarms == int((fa >= row.threshold).sum())
        assert row.detected == int((best[~np.isnan(best)] >= row.threshold).sum())
        assert row.events == 45
        exact = rates.poisson_rate(row.false_alarms, 120.0)
        assert (row.low, row.high) == (pytest.approx(exact.low), pytest.approx(exact.high))
        w = rates.proportion(row.detected, 45)
        assert (row.detected_low, row.detected_high) == (pytest.approx(w.low), pytest.approx(w.high))
        assert row.meets_target == (exact.high <= 1.0)
        assert row.miss_share == pytest.approx(1 - row.detected / 45)
    # Raising the threshold never adds false alarms or detections.
    assert np.all(np.diff(table["false_alarms"]) <= 0) and np.all(np.diff(table["detected"]) <= 0)
    assert table["meets_target"].iloc[-1] and not table["meets_target"].iloc[0]


def test_grouped_scores_with_counts():
    table = whatif.at_thresholds(
        [0.7, 0.8, 0.9], 10.0, [], [0.7, 0.85], floor=0.7, target=1.0, fa_counts=[5, 3, 2]
    )
    assert table["false_alarms"].tolist() == [10, 2]
    assert table["detected_share"].isna().all()


def test_threshold_below_the_floor_is_refused():
    with pytest.raises(ValueError, match="cannot be simulated"):
        whatif.at_thresholds([0.7], 1.0, [0.8], [0.5, 0.7], floor=0.6, target=1.0)


def test_states_flag_lost_detections_and_missing_staged_events():
    # Floor 0.6: 4 staged events detected there; at 0.8 one of them (best score 0.7) is lost.
    fa = [0.61, 0.65, 0.7, 0.75, 0.9]
    best = [0.62, 0.7, 0.85, 0.95, np.nan]
    table = whatif.at_thresholds(fa, 100.0, best, [0.6, 0.8, 0.96], floor=0.6, target=1.0)
    assert table["lost_detections"].tolist() == [0, 2, 4]
    assert table["state"].tolist() == [whatif.ACCEPTABLE, whatif.LOSES_DETECTIONS, whatif.LOSES_DETECTIONS]
    assert whatif.state_text(whatif.LOSES_DETECTIONS, 2) == "Meets the target but loses 2 staged detections."
    # The rule's bound: the upper end of the two-sided 95% exact interval (Garwood).
    assert table["upper"].iloc[0] == pytest.approx(rates.poisson_rate(5, 100.0).high)
    # No staged events: never "acceptable", even at 0% known detection.
    none = whatif.at_thresholds(fa, 100.0, [], [0.6], floor=0.6, target=1.0)
    assert none["state"].tolist() == [whatif.NO_STAGED_EVENTS]
    above = whatif.at_thresholds(fa, 2.0, best, [0.6], floor=0.6, target=1.0)
    assert above["state"].tolist() == [whatif.ABOVE_TARGET] and not above["meets_target"].iloc[0]


def test_per_home_bound_uses_the_home_level_interval():
    from server.analytics import homerate

    rng = np.random.default_rng(4)
    homes = 12
    hm = rng.uniform(1.0, 3.0, homes)
    counts = rng.poisson(0.5 * hm)
    where = np.repeat(np.arange(homes), counts)
    scores = rng.uniform(0.6, 1.0, len(where))
    table = whatif.at_thresholds(
        scores,
        float(hm.sum()),
        [0.9],
        [0.6, 0.8],
        floor=0.6,
        target=5.0,
        fa_homes=where,
        home_months_by_home=hm,
    )
    for row in table.itertuples():
        per_home = np.bincount(where[scores >= row.threshold], minlength=homes)
        assert row.upper == pytest.approx(homerate.home_rate(per_home, hm).high)
    few = whatif.at_thresholds(
        scores[:3],
        5.0,
        [0.9],
        [0.6],
        floor=0.6,
        target=5.0,
        fa_homes=[0, 1, 2],
        home_months_by_home=[1.0, 2, 2],
    )
    assert few["state"].tolist() == [whatif.TOO_FEW_HOMES]
