"""Benchmark: the trial-to-date weekly summary against the bare SQL aggregation it rests on.

A synthetic pilot (homes over 12 months, alerts and listening segments bulk-inserted with
SQLAlchemy Core) is built on SQLite, and on PostgreSQL when a URL is given. On each database the
script times, in the same run:

- bare: false alarms per home and month, and monitored seconds per home and month, in SQL;
- summary: `weekly.build_summary(...)` for the last week, trial to date (everything it shows).

Alerts inside a listening segment carry the mark the live heartbeat path gives them
(`Alert.within_listening`); the 3% placed anywhere in a device's span are left unmarked, so the
summary checks those against the segments itself, as it would in a running pilot.

It prints the summary's time over the bare queries' time and its peak memory (Python heap as seen
by tracemalloc, which counts numpy buffers, and the peak resident size of a fresh process that
builds the summary once), for 1,000 homes and for 100 homes (growth: time per home should not rise
from 100 to 1,000 homes). Targets: ratio <= 3, peak memory < 1 GB, growth no faster than linear.
It asserts nothing. Times are medians of --repeats runs on warm caches.

    python tests/benchmarks/bench_summary.py [--postgres-url URL] [--homes 1000] [--small 100]
                                             [--proposed-index]

Figures (2-core machine, `--homes 300 --small 100`; summary time over bare time, medians of 3-5
rounds; single runs vary by a quarter), before and after the summary's speed-up of 2026-12-04
(vectorised per-home binomial tests, pair statistic only where the answer needs it, per home and
group sums without pivot tables, disturbances in one sort; every figure unchanged):

    SQLite      100 homes: 3.88-3.89 (1.28-1.37 s)  ->  2.41-2.65 (0.83 s)
                300 homes: 4.83-5.10 (2.86-3.29 s)  ->  3.04-3.35 (1.90-1.94 s)
    PostgreSQL  100 homes: 13.1 (1.20 s)            ->  5.7 (0.59 s)
                300 homes: 8.2 (2.52 s)             ->  5.9 (1.12 s)

At 300 homes on SQLite about 1.0 s of the summary is `load.load_pilot` (reading the database),
against 0.6 s for the bare queries; the rest (statistics) went from 1.7 s to 0.6-0.7 s, of which
the seeded null band's multinomial draws are about 0.15 s (their stream is what the seed fixes).
PostgreSQL's bare queries take 0.1-0.3 s, so the ratio there is dominated by the load and the
statistics, not the database.
"""

from __future__ import annotations

import argparse
import datetime as dt
import gc
import resource
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import sqlalchemy as sa

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from server import migrate  # noqa: E402
from server.db import make_engine, make_session_factory, seconds_between  # noqa: E402
from server.devices.models import Alert, Clip, Device, ListeningSegment  # noqa: E402
from server.households.models import Home, HomeStateChange  # noqa: E402
from server.installations.models import Installation  # noqa: E402
from server.staged.models import StagedEvent  # noqa: E402
from server.trials.models import Trial  # noqa: E402

UTC = dt.UTC
START = dt.datetime(2025, 11, 3, tzinfo=UTC)  # a Monday
DAYS = 364  # 52 whole weeks
CLASSES = ["smoke_alarm", "baby_cry", "glass_break"]
CAUSES = ["speech", "tv_radio_music", "dog", "kitchen_cooking", "appliance", "door_knock_impact", "unknown"]
ROOMS = ["kitchen", "hallway", "landing", "living_room", "nursery", "bedroom"]
BATCH = 20_000


def _insert(conn: sa.Connection, table: sa.Table, rows: list[dict[str, object]]) -> None:
    for i in range(0, len(rows), BATCH):
        conn.execute(table.insert(), rows[i : i + BATCH])


def _ts(seconds: np.ndarray) -> list[dt.datetime]:
    base = START.timestamp()
    return [dt.datetime.fromtimestamp(base + float(s), tz=UTC) for s in seconds]


def build_pilot(engine: sa.Engine, *, homes: int, alerts: int, segments: int, seed: int = 7) -> str:
    """Insert a synthetic pilot; return its trial code."""
    rng = np.random.default_rng(seed)
    span_s = DAYS * 86400.0
    code = f"BENCH-{homes}"
    with engine.begin() as conn:
        trial_id = conn.execute(
            sa.insert(Trial.__table__).returning(Trial.__table__.c.id),
            [
                {
                    "code": code,
                    "name": f"Benchmark pilot, {homes} homes",
                    "starts_on": START.date(),
                    "ends_on": None,
                    "sound_classes": CLASSES,
                    "fa_target_per_home_month": 1.0,
                    "timezone": "Europe/London",
                    "causes": [{"code": c, "label": c} for c in CAUSES],
                    "second_review_share": 0.1,
                    "quota_states": ["consented", "installed", "active"],
                    "created_at": START,
                }
            ],
        ).scalar_one()
        home_ids = [
            conn.execute(
                sa.insert(Home.__table__).returning(Home.__table__.c.id),
                [
                    {
                        "trial_id": trial_id,
                        "code": f"B{homes}-{i:04d}",
                        "state": "active",
                        "state_changed_at": START,
                        "attributes": {},
                        "created_at": START,
                    }
                ],
            ).scalar_one()
            for i in range(homes)
        ]
        # Lifecycle: installed on day 0, active a day later; 5% withdraw at a random time.
        changes: list[dict[str, object]] = []
        withdrawn_at: dict[int, float] = {}
        for h in home_ids:
            changes.append(
                {
                    "home_id": h,
                    "from_state": "consented",
                    "to_state": "installed",
                    "at": START,
                    "listening": True,
                }
            )
            changes.append(
                {
                    "home_id": h,
                    "from_state": "installed",
                    "to_state": "active",
                    "at": START + dt.timedelta(days=1),
                    "listening": True,
                }
            )
            if rng.random() < 0.05:
                w = float(rng.uniform(0.3, 0.9) * span_s)
                withdrawn_at[h] = w
                changes.append(
                    {
                        "home_id": h,
                        "from_state": "active",
                        "to_state": "withdrawn",
                        "at": START + dt.timedelta(seconds=w),
                        "listening": True,
                    }
                )
        _insert(conn, HomeStateChange.__table__, changes)
        # Devices: one per home, a second in 10% of homes.
        dev_home = home_ids + [int(h) for h in rng.choice(home_ids, size=homes // 10, replace=False)]
        models = rng.choice(["HX-1", "HX-2", "HX-3"], size=len(dev_home), p=[0.5, 0.3, 0.2])
        firmware = rng.choice(["4.1.0", "4.2.0"], size=len(dev_home))
        dev_rows = [
            {
                "trial_id": trial_id,
                "serial": f"B{homes}-D{i:05d}",
                "hardware_model": str(models[i]),
                "firmware": str(firmware[i]),
                "token_hash": f"{homes:04d}{i:060d}",
                "revoked": False,
                "heartbeat_interval_s": 60,
                "last_seen_at": START + dt.timedelta(seconds=span_s),
                "clock_skew_s": float(rng.normal(0, 2)),
                "created_at": START,
            }
            for i in range(len(dev_home))
        ]
        dev_ids = (
            [
                r
                for (r,) in conn.execute(
                    sa.insert(Device.__table__).returning(Device.__table__.c.id), dev_rows
                ).all()
            ]
            if engine.dialect.name == "postgresql"
            else None
        )
        if dev_ids is None:
            dev_ids = []
            for row in dev_rows:
                dev_ids.append(
                    conn.execute(
                        sa.insert(Device.__table__).returning(Device.__table__.c.id), [row]
                    ).scalar_one()
                )
        # Installations: 3% of devices move to another home mid-trial.
        inst_rows = []
        spans = []  # (device index, start s, end s)
        for i, (d, h) in enumerate(zip(dev_ids, dev_home, strict=True)):
            room = str(rng.choice(ROOMS))
            end = withdrawn_at.get(h, span_s)
            if rng.random() < 0.03:
                move = float(rng.uniform(0.2, 0.8) * end)
                other = int(rng.choice(home_ids))
                inst_rows.append(
                    {
                        "device_id": d,
                        "home_id": h,
                        "room": room,
                        "installed_at": START,
                        "removed_at": START + dt.timedelta(seconds=move),
                        "created_at": START,
                    }
                )
                inst_rows.append(
                    {
                        "device_id": d,
                        "home_id": other,
                        "room": str(rng.choice(ROOMS)),
                        "installed_at": START + dt.timedelta(seconds=move + 7200),
                        "removed_at": None,
                        "created_at": START,
                    }
                )
            else:
                inst_rows.append(
                    {
                        "device_id": d,
                        "home_id": h,
                        "room": room,
                        "installed_at": START,
                        "removed_at": None,
                        "created_at": START,
                    }
                )
            spans.append((i, 0.0, end))
        _insert(conn, Installation.__table__, inst_rows)
        # Listening segments: per device, `k` slots over its span, each listening after a random gap.
        n_dev = len(dev_ids)
        per_dev = np.full(n_dev, segments // n_dev)
        per_dev[: segments - per_dev.sum()] += 1
        seg_rows = []
        seg_index = []  # (device index, start s, end s) for placing alerts
        for (i, s0, s1), k in zip(spans, per_dev, strict=True):
            edges = np.linspace(s0, s1, k + 1)
            slot = edges[1:] - edges[:-1]
            starts = edges[:-1] + rng.uniform(0.02, 0.25, size=k) * slot
            ends = edges[1:]
            seg_index.append((starts, ends))
            for a, b in zip(_ts(starts), _ts(ends), strict=True):
                seg_rows.append(
                    {
                        "device_id": dev_ids[i],
                        "started_at": a,
                        "ended_at": b,
                        "is_open": False,
                        "heartbeats": 100,
                    }
                )
        _insert(conn, ListeningSegment.__table__, seg_rows)
        del seg_rows
        clip_id = conn.execute(
            sa.insert(Clip.__table__).returning(Clip.__table__.c.id),
            [
                {
                    "sha256": f"{homes:064d}",
                    "storage_key": "bench",
                    "format": "WAV",
                    "subtype": "PCM_16",
                    "sample_rate_hz": 16000,
                    "channels": 1,
                    "frames": 160000,
                    "duration_s": 10.0,
                    "peak_dbfs": -3.0,
                    "rms_dbfs": -20.0,
                    "clipped_fraction": 0.0,
                    "size_bytes": 320044,
                    "created_at": START,
                }
            ],
        ).scalar_one()
        # Alerts: device rates vary (gamma); 97% inside a listening segment, 3% anywhere in the span.
        weights = rng.gamma(0.8, 1.0, size=n_dev)
        dev_of = rng.choice(n_dev, size=alerts, p=weights / weights.sum())
        home_of = {d: h for d, h in zip(dev_ids, dev_home, strict=True)}
        alert_rows = []
        labels = rng.choice(
            ["false_alarm", "confirmed", "unsure", "unusable", None],
            size=alerts,
            p=[0.70, 0.18, 0.05, 0.02, 0.05],
        )
        for n, i in enumerate(dev_of):
            starts, ends = seg_index[i]
            # As the heartbeat after a detection records it (Alert.within_listening): True for an
            # alert inside a segment; the 3% placed anywhere are left unmarked for analytics to check.
            within = rng.random() < 0.97
            if within:
                j = int(rng.integers(len(starts)))
                t = float(rng.uniform(starts[j], ends[j]))
            else:
                t = float(rng.uniform(spans[i][1], spans[i][2]))
            at = START + dt.timedelta(seconds=t)
            label = labels[n]
            alert_rows.append(
                {
                    "device_id": dev_ids[i],
                    "trial_id": trial_id,
                    "home_id": home_of[dev_ids[i]],
                    "installation_id": None,
                    "event_id": f"e{n}",
                    "sound_class": CLASSES[n % 3],
                    "score": float(rng.uniform(0.55, 1.0)),
                    "detected_at": at,
                    "detected_at_text": at.isoformat(),
                    "clock_skew_s": None,
                    "received_at": at + dt.timedelta(seconds=2),
                    "firmware": str(firmware[i]),
                    "clip_id": clip_id,
                    "clip_offset_s": 1.0,
                    "state": "final" if label is not None else "pending",
                    "final_label": label,
                    "final_cause": str(rng.choice(CAUSES)) if label == "false_alarm" else None,
                    "final_resemblance": str(rng.choice(["resembles", "unrelated"]))
                    if label == "false_alarm"
                    else None,
                    "final_method": "single" if label is not None else None,
                    "private_flag": False,
                    "needs_second_review": False,
                    "within_listening": True if within else None,
                }
            )
        _insert(conn, Alert.__table__, alert_rows)
        del alert_rows
        # Two staged events per home, each detected by an alert in 85% of cases.
        staged, extra = [], []
        for h in home_ids:
            for _ in range(2):
                t = float(rng.uniform(0.05, 0.25) * span_s)
                at = START + dt.timedelta(seconds=t)
                cls = str(rng.choice(CLASSES))
                staged.append(
                    {
                        "trial_id": trial_id,
                        "home_id": h,
                        "sound_class": cls,
                        "started_at": at,
                        "ended_at": at + dt.timedelta(seconds=60),
                        "source": "test sound, 3 m",
                        "created_at": at,
                    }
                )
                if rng.random() < 0.85:
                    d = dev_ids[dev_home.index(h)]
                    det = at + dt.timedelta(seconds=float(rng.uniform(1, 20)))
                    extra.append(
                        {
                            "device_id": d,
                            "trial_id": trial_id,
                            "home_id": h,
                            "installation_id": None,
                            "event_id": f"s{len(extra)}",
                            "sound_class": cls,
                            "score": float(rng.uniform(0.6, 1.0)),
                            "detected_at": det,
                            "detected_at_text": det.isoformat(),
                            "clock_skew_s": None,
                            "received_at": det,
                            "firmware": "4.2.0",
                            "clip_id": clip_id,
                            "clip_offset_s": 1.0,
                            "state": "final",
                            "final_label": "confirmed",
                            "final_cause": None,
                            "final_resemblance": None,
                            "final_method": "single",
                            "private_flag": False,
                            "needs_second_review": False,
                            "within_listening": None,
                        }
                    )
        _insert(conn, StagedEvent.__table__, staged)
        _insert(conn, Alert.__table__, extra)
    return code


def bare_queries(engine: sa.Engine, code: str) -> None:
    """False alarms and monitored seconds per home and month: the plain SQL a summary rests on."""
    name = engine.dialect.name
    a, s, i = Alert.__table__, ListeningSegment.__table__, Installation.__table__
    t = Trial.__table__
    month = (
        sa.func.strftime("%Y-%m", a.c.detected_at)
        if name == "sqlite"
        else sa.func.to_char(a.c.detected_at, "YYYY-MM")
    )
    seg_month = (
        sa.func.strftime("%Y-%m", s.c.started_at)
        if name == "sqlite"
        else sa.func.to_char(s.c.started_at, "YYYY-MM")
    )
    with engine.connect() as conn:
        trial_id = conn.execute(sa.select(t.c.id).where(t.c.code == code)).scalar_one()
        conn.execute(
            sa.select(a.c.home_id, month, sa.func.count())
            .where(a.c.trial_id == trial_id, a.c.final_label == "false_alarm")
            .group_by(a.c.home_id, month)
        ).all()
        from server.db import sql_greatest, sql_least

        lo = sql_greatest(name, s.c.started_at, i.c.installed_at)
        hi = sql_least(name, s.c.ended_at, sa.func.coalesce(i.c.removed_at, s.c.ended_at))
        conn.execute(
            sa.select(i.c.home_id, seg_month, sa.func.sum(seconds_between(name, hi, lo)))
            .select_from(s.join(i, i.c.device_id == s.c.device_id))
            .join(Home.__table__, Home.__table__.c.id == i.c.home_id)
            .where(
                Home.__table__.c.trial_id == trial_id,
                s.c.ended_at > i.c.installed_at,
                (i.c.removed_at.is_(None)) | (s.c.started_at < i.c.removed_at),
            )
            .group_by(i.c.home_id, seg_month)
        ).all()


def run_summary(engine: sa.Engine, code: str) -> object:
    from server.analytics import weekly

    factory = make_session_factory(engine)
    with factory() as session:
        now = START + dt.timedelta(days=DAYS, hours=12)
        return weekly.build_summary(session, trial_code=code, now=now)


def timed(fn, repeats: int) -> tuple[float, float, float]:  # type: ignore[no-untyped-def]
    """Median wall time over `repeats`, tracemalloc peak (MB) of one more run, and this process's peak RSS."""
    times = []
    for _ in range(repeats):
        gc.collect()
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    gc.collect()
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    return statistics.median(times), peak, peak_rss_mb()


PROPOSED_INDEX = (
    "CREATE INDEX ix_bench_listening_segment_device_span "
    "ON listening_segment (device_id, started_at, ended_at)"
)


def peak_rss_mb() -> float:
    """This process's peak resident size. VmHWM starts afresh at exec; ru_maxrss carries the
    parent's peak over a fork on Linux, so it is only the fallback."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def peak_rss_of_summary(url: str, code: str) -> float:
    """Peak resident size (MB) of a fresh process that builds the summary once."""
    out = subprocess.run(
        [sys.executable, __file__, "--rss-of", url, code], capture_output=True, text=True, check=True
    )
    return float(out.stdout.strip().splitlines()[-1])


def bench(url: str, label: str, homes_list: list[int], repeats: int, proposed_index: bool) -> None:
    engine = make_engine(url)
    migrate.upgrade(engine)
    codes = {}
    for homes in homes_list:
        scale = homes / 1000
        t0 = time.perf_counter()
        codes[homes] = build_pilot(
            engine, homes=homes, alerts=int(500_000 * scale), segments=int(1_000_000 * scale)
        )
        with engine.begin() as conn:
            conn.exec_driver_sql("ANALYZE")
        if engine.dialect.name == "sqlite":
            # A steady database: the bulk load's write-ahead log folded back into the file.
            with engine.connect() as conn:
                conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
        print(
            f"[{label}] built {homes} homes, {int(500_000 * scale)} alerts, "
            f"{int(1_000_000 * scale)} segments "
            f"in {time.perf_counter() - t0:.0f} s",
            flush=True,
        )
    variants = [("schema as migrated", None)]
    if proposed_index:
        variants.append(("with a (device_id, started_at, ended_at) segment index", PROPOSED_INDEX))
    for title, ddl in variants:
        if ddl:
            with engine.begin() as conn:
                conn.exec_driver_sql(ddl)
                conn.exec_driver_sql("ANALYZE")
        results = {}
        for homes, code in codes.items():
            bare_t, _, _ = timed(lambda c=code: bare_queries(engine, c), repeats)
            sum_t, sum_mem, _ = timed(lambda c=code: run_summary(engine, c), repeats)
            results[homes] = sum_t
            rss = peak_rss_of_summary(url, code)
            print(
                f"[{label}, {title}] {homes} homes: bare SQL aggregation {bare_t:.2f} s; "
                f"summary {sum_t:.2f} s; "
                f"ratio {sum_t / bare_t:.2f} (target <= 3); summary peak memory {sum_mem:.0f} MB traced, "
                f"{rss:.0f} MB peak RSS of a process building it (target < 1024 MB)",
                flush=True,
            )
        if len(results) == 2:
            small, large = sorted(results)
            growth = (results[large] / results[small]) / (large / small)
            print(
                f"[{label}, {title}] growth {small} -> {large} homes: "
                f"time x{results[large] / results[small]:.2f} "
                f"for x{large / small:.0f} homes (per-home ratio {growth:.2f}; <= 1 is linear or better)",
                flush=True,
            )
    engine.dispose()


def main() -> None:
    if len(sys.argv) == 4 and sys.argv[1] == "--rss-of":
        run_summary(make_engine(sys.argv[2]), sys.argv[3])
        print(peak_rss_mb())
        return
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--postgres-url", help="an empty PostgreSQL database to build the pilot in")
    p.add_argument("--homes", type=int, default=1000)
    p.add_argument("--small", type=int, default=100)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument(
        "--proposed-index",
        action="store_true",
        help="also time the summary after adding a covering index on listening segments",
    )
    args = p.parse_args()
    homes = sorted({args.small, args.homes})
    with tempfile.TemporaryDirectory() as tmp:
        bench(f"sqlite:///{tmp}/bench.db", "sqlite", homes, args.repeats, args.proposed_index)
    if args.postgres_url:
        bench(args.postgres_url, "postgresql", homes, args.repeats, args.proposed_index)


if __name__ == "__main__":
    main()
