"""Disturbances: one home's alerts on one sound counted once; the outcome of a disturbance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from server.analytics import disturbances


def test_two_devices_on_one_sound_are_one_disturbance() -> None:
    # Home 1: two devices 4 s apart, then the same sound 10 minutes later; home 2 at the same time.
    number = disturbances.group([1, 1, 1, 2], ["smoke"] * 4, [100.0, 104.0, 700.0, 101.0], window_s=60.0)
    assert number.tolist() == [0, 0, 1, 2]


def test_other_sound_classes_are_other_disturbances() -> None:
    number = disturbances.group([1, 1], ["smoke", "cry"], [100.0, 100.0], window_s=60.0)
    assert len(set(number.tolist())) == 2


def test_disturbances_do_not_chain_past_the_window_from_the_first_alert() -> None:
    # Alerts every 40 s: each is within 60 s of the one before, but the third is 80 s after the
    # first, so it starts the second disturbance; the fourth (120 s) joins that one (40 s after it).
    t = [0.0, 40.0, 80.0, 120.0, 160.0]
    assert disturbances.group([7] * 5, ["cry"] * 5, t, window_s=60.0).tolist() == [0, 0, 1, 1, 2]


def test_window_edge_is_inside_and_zero_window_groups_only_the_same_instant() -> None:
    assert disturbances.group([1, 1], ["x", "x"], [0.0, 60.0], window_s=60.0).tolist() == [0, 0]
    assert disturbances.group([1, 1], ["x", "x"], [0.0, 60.001], window_s=60.0).tolist() == [0, 1]
    assert disturbances.group([1, 1, 1], ["x"] * 3, [5.0, 5.0, 6.0], window_s=0.0).tolist() == [0, 0, 1]
    with pytest.raises(ValueError):
        disturbances.group([1], ["x"], [0.0], window_s=-1.0)


def test_order_of_the_input_does_not_matter() -> None:
    rng = np.random.default_rng(4)
    homes = rng.integers(0, 5, 300)
    classes = rng.choice(["a", "b"], 300)
    t = np.round(rng.uniform(0, 3600, 300))
    base = disturbances.group(homes, classes, t, window_s=60.0)
    perm = rng.permutation(300)
    again = disturbances.group(homes[perm], classes[perm], t[perm], window_s=60.0)
    # The same partition of alerts (numbers may differ only by relabelling; here they are equal,
    # since numbers follow home, class and time).
    assert again.tolist() == base[perm].tolist()


def test_anchor_rule_against_a_plain_loop() -> None:
    rng = np.random.default_rng(11)
    homes = rng.integers(0, 3, 400)
    classes = rng.choice(["a", "b"], 400)
    t = rng.uniform(0, 4000, 400)
    got = disturbances.group(homes, classes, t, window_s=45.0)
    # Straightforward reference: walk each (home, class) in time order.
    expected = {}
    for key in sorted(set(zip(homes.tolist(), classes.tolist(), strict=True))):
        rows = sorted((i for i in range(400) if (homes[i], classes[i]) == key), key=lambda i: t[i])
        anchor = None
        label = -1
        for i in rows:
            if anchor is None or t[i] - anchor > 45.0:
                anchor, label = t[i], label + 1
            expected[i] = (key, label)
    pairs = {}
    for i in range(400):
        pairs.setdefault(expected[i], set()).add(int(got[i]))
    assert all(len(v) == 1 for v in pairs.values())
    assert len({next(iter(v)) for v in pairs.values()}) == len(pairs)


@pytest.mark.parametrize(
    ("outcomes", "expected"),
    [
        (["false_alarm", "confirmed"], "confirmed"),
        (["unsure", "false_alarm", "pending"], "false_alarm"),
        (["unusable", "unsure", "pending"], "pending"),
        (["unusable", "unsure"], "unsure"),
        (["unusable", "unusable"], "unusable"),
    ],
)
def test_outcome_of_a_disturbance(outcomes: list[str], expected: str) -> None:
    n = len(outcomes)
    frame = pd.DataFrame(
        {"home_id": [1] * n, "sound_class": ["x"] * n, "t": np.arange(n, dtype=float), "outcome": outcomes}
    )
    out = disturbances.summarise(frame, window_s=60.0)
    assert out["outcome"].tolist() == [expected] and out["alerts"].tolist() == [n]


def test_summary_keeps_the_first_alerts_columns() -> None:
    frame = pd.DataFrame(
        {
            "home_id": [1, 1, 2],
            "sound_class": ["x", "x", "x"],
            "t": [30.0, 10.0, 10.0],
            "outcome": ["false_alarm", "pending", "unusable"],
            "period": ["week", "before", "week"],
        }
    )
    out = disturbances.summarise(frame, window_s=60.0)
    assert out[["home_id", "t", "period", "alerts", "outcome"]].values.tolist() == [
        [1, 10.0, "before", 2, "false_alarm"],
        [2, 10.0, "week", 1, "unusable"],
    ]
    with pytest.raises(ValueError):
        disturbances.summarise(frame.assign(outcome="lost"), window_s=60.0)
    assert disturbances.summarise(frame.iloc[:0], window_s=60.0).empty
