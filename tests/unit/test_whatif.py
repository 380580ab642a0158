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
