"""Staged detections taken out of the counted alerts: the summary's quick matching equals a plain merge."""

from __future__ import annotations

import types

import numpy as np
import pandas as pd
import pytest

from server.analytics import weekly

KEYS = ["window_id", "period", "sound_class", "outcome", "cause", "resemblance"]


def _merged(frame: pd.DataFrame, removed: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """The straightforward form: count the removed rows per key, merge, subtract, drop emptied rows."""
    n = removed.groupby(keys, dropna=False).size().rename("removed").reset_index()
    out = frame.merge(n, on=keys, how="left")
    out["alerts"] = out["alerts"] - out["removed"].fillna(0).astype(np.int64)
    return out.drop(columns="removed")[out["alerts"] > 0].reset_index(drop=True)


def _counted(seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    rows = pd.DataFrame(
        {
            "window_id": rng.integers(0, 12, 400),
            "period": rng.choice(["week", "before"], 400),
            "sound_class": rng.choice(["smoke_alarm", "baby_cry"], 400),
            "outcome": rng.choice(["false_alarm", "confirmed", "pending"], 400),
            "cause": rng.choice(["", "dog", "kettle"], 400),
            "resemblance": pd.Series(rng.choice(["", "resembles", None], 400), dtype="str"),
        }
    ).drop_duplicates(KEYS, ignore_index=True)
    frame = rows.assign(alerts=rng.integers(1, 4, len(rows)))
    # Detections fall on counted rows (up to all of a row's alerts) and, now and then, on none.
    taken = rows.sample(40, random_state=seed)
    taken = pd.concat([taken, taken.iloc[:10], taken.iloc[:3]], ignore_index=True)
    stray = rows.iloc[:2].assign(window_id=99)
    return frame, pd.concat([taken, stray], ignore_index=True).assign(alert_id=np.arange(len(taken) + 2))


@pytest.mark.parametrize("seed", range(5))
def test_subtract_equals_the_merge(seed: int) -> None:
    frame, removed = _counted(seed)
    pd.testing.assert_frame_equal(weekly._subtract(frame, removed, KEYS), _merged(frame, removed, KEYS))
    assert weekly._subtract(frame, removed.iloc[:0], KEYS) is frame


@pytest.mark.parametrize("seed", range(3))
def test_counted_rows_are_the_subtracted_frame(seed: int) -> None:
    frame, removed = _counted(seed)
    ctx = types.SimpleNamespace(windows=pd.DataFrame({"window_id": np.arange(12)}))
    weekly._Context._count_rows(ctx, frame, removed)  # type: ignore[arg-type]
    expected = _merged(frame, removed, KEYS)
    assert ctx._c_alerts.tolist() == expected["alerts"].tolist()
    assert ctx._c_window.tolist() == expected["window_id"].tolist()
    assert ctx._c_week.tolist() == (expected["period"] == "week").tolist()
    assert ctx._c_false_alarm.tolist() == (expected["outcome"] == "false_alarm").tolist()
    for cls, rows in ctx._c_rows.items():
        assert rows.tolist() == np.flatnonzero(expected["sound_class"] == cls).tolist()
    codes, values = ctx._c_cause
    assert [values[c] for c in codes] == expected["cause"].tolist()


def test_matching_many_wide_keys_does_not_overflow() -> None:
    rng = np.random.default_rng(3)
    here = [rng.integers(0, 2**25, 300) for _ in range(4)]
    there = [np.concatenate([h[:50], rng.integers(0, 2**25, 20)]) for h in here]
    got = weekly._matches_per_row(here, there)
    wanted = {}
    for key in zip(*there, strict=True):
        wanted[key] = wanted.get(key, 0) + 1
    assert got.tolist() == [wanted.get(key, 0) for key in zip(*here, strict=True)]
