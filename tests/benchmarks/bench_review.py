"""Benchmark: handing out the next clip, and drawing a clip's review images.

With 100,000 alerts bulk-inserted with SQLAlchemy Core (most already decided, a few thousand
waiting, some in blind second review, a few hundred gold checks), the script times in the
same run and on the same database:

- bare: one indexed single-row query, the oldest pending alert (``state``, ``received_at``);
- hand-out: ``review.service.claim_next`` for a reviewer, including its commit, as the verdict
  route runs it after each verdict (a verdict is recorded between hand-outs, untimed);
- hand-out over HTTP: ``POST /api/v1/review/claims`` through the app (sign-in, JSON, commit).

and reports each p95 and the ratio hand-out / bare. Then, for a 10 s 16 kHz clip, the time of
``images.render_clip_images`` (waveform + spectrogram + both PNGs) and its peak memory under
tracemalloc, plus decode time. Targets: hand-out p95 under 50 ms; images under 50 ms per clip.
It asserts nothing.

    python tests/benchmarks/bench_review.py [--alerts 100000] [--runs 300] [--postgres | --postgres-url URL]
"""

from __future__ import annotations

import argparse
import datetime as dt
import io
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import soundfile as sf
import sqlalchemy as sa

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from server import migrate  # noqa: E402
from server.auth.models import User  # noqa: E402
from server.auth.passwords import hash_password  # noqa: E402
from server.db import make_engine, make_session_factory, writer_engine  # noqa: E402
from server.devices import audio  # noqa: E402
from server.devices.models import Alert, AlertState, Clip, Device  # noqa: E402
from server.households.models import Home  # noqa: E402
from server.installations.models import Installation  # noqa: E402
from server.review import images, queue, service  # noqa: E402
from server.review.models import GoldCheck, Verdict  # noqa: E402
from server.trials.models import Trial  # noqa: E402

UTC = dt.UTC
BATCH = 20_000
CLASSES = ["smoke_alarm", "baby_cry", "glass_break"]
PASSWORD = "bench password 123"


def _insert(conn: sa.Connection, table: sa.Table, rows: list[dict[str, object]]) -> None:
    for i in range(0, len(rows), BATCH):
        conn.execute(table.insert(), rows[i : i + BATCH])


def _p95(values: list[float]) -> float:
    return float(np.percentile(np.array(values), 95))


def build(engine: sa.Engine, n_alerts: int, rng: np.random.Generator) -> dict[str, int]:
    now = dt.datetime.now(UTC).replace(microsecond=0)
    start = now - dt.timedelta(days=200)
    with engine.begin() as conn:
        trial_id = conn.execute(
            sa.insert(Trial.__table__)
            .values(
                code="BENCH",
                name="Review benchmark",
                starts_on=start.date(),
                sound_classes=CLASSES,
                fa_target_per_home_month=1.0,
                timezone="Europe/Dublin",
                causes=[
                    {"code": "dog", "label": "Dog"},
                    {"code": "appliance", "label": "Household appliance"},
                    {"code": "unknown", "label": "Unknown"},
                ],
                second_review_share=0.10,
                quota_states=["active"],
                created_at=start,
            )
            .returning(Trial.__table__.c.id)
        ).scalar_one()
        devices = [
            {
                "trial_id": trial_id,
                "serial": f"B-{i:04d}",
                "hardware_model": "HX-1",
                "token_hash": f"{i:064x}",
                "revoked": False,
                "heartbeat_interval_s": 60,
                "created_at": start,
            }
            for i in range(200)
        ]
        _insert(conn, Device.__table__, devices)
        device_ids = [
            r[0] for r in conn.execute(sa.select(Device.__table__.c.id).order_by(Device.__table__.c.id))
        ]
        homes = [
            {
                "trial_id": trial_id,
                "code": f"H-{i:04d}",
                "state": "active",
                "state_changed_at": start,
                "attributes": {},
                "created_at": start,
            }
            for i in range(200)
        ]
        _insert(conn, Home.__table__, homes)
        home_ids = [r[0] for r in conn.execute(sa.select(Home.__table__.c.id).order_by(Home.__table__.c.id))]
        _insert(
            conn,
            Installation.__table__,
            [
                {"device_id": d, "home_id": h, "room": "kitchen", "installed_at": start, "created_at": start}
                for d, h in zip(device_ids, home_ids, strict=True)
            ],
        )
        inst_ids = [
            r[0]
            for r in conn.execute(
                sa.select(Installation.__table__.c.id).order_by(Installation.__table__.c.id)
            )
        ]
        # One clip row per alert, as in a real pilot (the files themselves are not needed here).
        clip_rows = [
            {
                "sha256": f"{i:064x}",
                "storage_key": f"bench/{i:064x}",
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
                "created_at": start,
            }
            for i in range(n_alerts)
        ]
        _insert(conn, Clip.__table__, clip_rows)
        clip_ids = [r[0] for r in conn.execute(sa.select(Clip.__table__.c.id).order_by(Clip.__table__.c.id))]

        reviewers = []
        for i in range(6):
            reviewers.append(
                conn.execute(
                    sa.insert(User.__table__)
                    .values(
                        email=f"rev{i}@bench.test",
                        name=f"Bench reviewer {i}",
                        role="reviewer",
                        password_hash=hash_password(PASSWORD) if i == 0 else "x",
                        is_adjudicator=False,
                        active=True,
                        created_at=start,
                    )
                    .returning(User.__table__.c.id)
                ).scalar_one()
            )

        offsets = np.sort(rng.uniform(0, 199 * 86400, n_alerts))
        draw = rng.random(n_alerts)
        # Most alerts decided; the newest few thousand waiting, some of them in second review.
        waiting = np.arange(n_alerts) >= n_alerts - max(1, n_alerts // 25)
        rows = []
        for i in range(n_alerts):
            t = start + dt.timedelta(seconds=float(offsets[i]))
            k = int(rng.integers(0, len(device_ids)))
            if waiting[i]:
                state = AlertState.second_review if draw[i] < 0.15 else AlertState.pending
                final = None
            else:
                state, final = AlertState.final, ("confirmed" if draw[i] < 0.3 else "false_alarm")
            rows.append(
                {
                    "device_id": device_ids[k],
                    "trial_id": trial_id,
                    "home_id": home_ids[k],
                    "installation_id": inst_ids[k],
                    "event_id": f"e{i}",
                    "sound_class": CLASSES[i % 3],
                    "score": float(0.5 + 0.5 * draw[i]),
                    "detected_at": t,
                    "detected_at_text": t.isoformat(),
                    "received_at": t,
                    "firmware": "2.1.0",
                    "clip_id": clip_ids[i],
                    "clip_offset_s": 4.0,
                    "state": state,
                    "needs_second_review": state == AlertState.second_review,
                    "final_label": final,
                    "final_method": "single" if final else None,
                    "finalized_at": t if final else None,
                    "private_flag": False,
                }
            )
        _insert(conn, Alert.__table__, rows)
        ids = [r[0] for r in conn.execute(sa.select(Alert.__table__.c.id).order_by(Alert.__table__.c.id))]
        verdicts = []
        for j, aid in enumerate(ids):
            row = rows[j]
            if row["state"] == AlertState.pending:
                continue
            verdicts.append(
                {
                    "alert_id": aid,
                    "reviewer_id": reviewers[1 + j % 5],
                    "round": 1,
                    "label": row["final_label"] or "unsure",
                    "created_at": row["received_at"],
                }
            )
        _insert(conn, Verdict.__table__, verdicts)
        decided = [aid for aid, r in zip(ids, rows, strict=True) if r["state"] == AlertState.final]
        gold = rng.choice(decided, size=min(300, len(decided)), replace=False)
        _insert(
            conn,
            GoldCheck.__table__,
            [{"alert_id": int(a), "expected_label": "confirmed", "created_at": now} for a in gold],
        )
    return {
        "alerts": len(ids),
        "verdicts": len(verdicts),
        "waiting": int(waiting.sum()),
        "gold": len(gold),
        "reviewer_id": reviewers[0],
    }


def bench_handout(url: str, n_alerts: int, runs: int, label: str) -> None:
    rng = np.random.default_rng(20240611)
    engine = make_engine(url)
    migrate.upgrade(engine)
    t0 = time.perf_counter()
    info = build(engine, n_alerts, rng)
    build_s = time.perf_counter() - t0
    with engine.connect() as conn:
        if engine.dialect.name == "postgresql":
            conn.execute(sa.text("ANALYZE"))
            conn.commit()
        else:
            conn.execute(sa.text("ANALYZE"))
    factory = make_session_factory(writer_engine(engine))
    key = queue.routing_key("bench secret")

    bare_q = sa.select(Alert.id).where(Alert.state == AlertState.pending).order_by(Alert.received_at).limit(1)
    bare, handout = [], []
    with factory() as session:
        reviewer = session.get(User, info["reviewer_id"])
        assert reviewer is not None
        for _ in range(20):  # warm caches and the statement cache
            session.execute(bare_q).scalar_one()
        session.commit()
        for i in range(runs):
            t = time.perf_counter()
            session.execute(bare_q).scalar_one()
            session.commit()
            bare.append(time.perf_counter() - t)

            t = time.perf_counter()
            view = service.claim_next(session, reviewer=reviewer, claim_minutes=5, key=key)
            session.commit()
            handout.append(time.perf_counter() - t)
            assert view.current is not None
            label_ = "confirmed" if i % 3 else "false_alarm"
            service.record_verdict(
                session,
                reviewer=reviewer,
                alert_id=view.current.alert_id,
                label=label_,
                cause="dog" if label_ == "false_alarm" else None,
                resemblance="unrelated" if label_ == "false_alarm" else None,
                key=key,
            )
            session.commit()
    http = _bench_http(url, runs // 3)
    engine.dispose()
    print(
        f"\n[{label}] {info['alerts']:,} alerts ({info['waiting']:,} waiting, {info['verdicts']:,} verdicts, "
        f"{info['gold']} gold checks); built in {build_s:.1f} s"
    )
    print(
        f"  bare indexed single-row query  p50 {1e3 * statistics.median(bare):7.3f} ms   "
        f"p95 {1e3 * _p95(bare):7.3f} ms"
    )
    print(
        f"  claim_next + commit (service)  p50 {1e3 * statistics.median(handout):7.3f} ms   "
        f"p95 {1e3 * _p95(handout):7.3f} ms"
    )
    print(
        f"  POST /api/v1/review/claims     p50 {1e3 * statistics.median(http):7.3f} ms   "
        f"p95 {1e3 * _p95(http):7.3f} ms"
    )
    print(
        f"  ratio hand-out p95 / bare p95: {_p95(handout) / _p95(bare):.1f} (service), "
        f"{_p95(http) / _p95(bare):.1f} (HTTP)   target: hand-out p95 < 50 ms"
    )


def _bench_http(url: str, runs: int) -> list[float]:
    import re

    from fastapi.testclient import TestClient

    from server.app import create_app
    from server.settings import Settings

    with tempfile.TemporaryDirectory() as tmp:
        app = create_app(Settings(data_dir=Path(tmp), database_url=url, secret_key="bench-" + "s" * 40))
        times: list[float] = []
        with TestClient(app) as c:
            token = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/login").text).group(1)  # type: ignore[union-attr]
            c.post("/login", data={"email": "rev0@bench.test", "password": PASSWORD, "csrf_token": token})
            csrf = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/account").text).group(1)  # type: ignore[union-attr]
            h = {"X-CSRF-Token": csrf}
            for i in range(runs + 5):
                t = time.perf_counter()
                r = c.post("/api/v1/review/claims", json={}, headers=h)
                dt_s = time.perf_counter() - t
                assert r.status_code == 200, r.text
                if i >= 5:
                    times.append(dt_s)
                cur = r.json()["current"]["alert_id"]
                r = c.post(f"/api/v1/alerts/{cur}/verdicts", json={"label": "confirmed"}, headers=h)
                assert r.status_code in (201, 409), r.text
        return times


def bench_images(runs: int) -> None:
    rng = np.random.default_rng(7)
    rate = 16000
    t = np.arange(10 * rate) / rate
    x = 0.3 * np.sin(2 * np.pi * 3100 * t) * ((t % 1.0) < 0.5) + 0.02 * rng.standard_normal(t.size)
    buf = io.BytesIO()
    sf.write(buf, x.astype(np.float32), rate, subtype="PCM_16", format="WAV")
    wav = buf.getvalue()
    samples, _ = audio.decode_mono(wav)
    for _ in range(3):
        images.render_clip_images(samples, rate)
    render, decode = [], []
    for _ in range(runs):
        t0 = time.perf_counter()
        s, r = audio.decode_mono(wav)
        t1 = time.perf_counter()
        images.render_clip_images(s, r)
        t2 = time.perf_counter()
        decode.append(t1 - t0)
        render.append(t2 - t1)
    tracemalloc.start()
    out = images.render_clip_images(samples, rate)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(
        f"\n[images] 10 s, 16 kHz clip -> waveform {out.meta.waveform_size} + "
        f"spectrogram {out.meta.spectrogram_size}, "
        f"PNG {len(out.waveform_png) // 1024} + {len(out.spectrogram_png) // 1024} KiB"
    )
    print(
        f"  render (STFT, envelope, two PNGs)  p50 {1e3 * statistics.median(render):6.1f} ms   "
        f"p95 {1e3 * _p95(render):6.1f} ms   target < 50 ms"
    )
    print(f"  decode WAV (for reference)         p50 {1e3 * statistics.median(decode):6.1f} ms")
    print(f"  peak traced memory during render   {peak / 2**20:6.1f} MiB")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--alerts", type=int, default=100_000)
    ap.add_argument("--runs", type=int, default=300)
    ap.add_argument("--image-runs", type=int, default=50)
    ap.add_argument("--postgres-url", default=None, help="an empty PostgreSQL database to fill")
    ap.add_argument(
        "--postgres",
        action="store_true",
        help="start a private PostgreSQL cluster (initdb/pg_ctl, as the tests do)",
    )
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        bench_handout(f"sqlite:///{Path(tmp) / 'bench.sqlite'}", args.alerts, args.runs, "sqlite")
    if args.postgres_url:
        bench_handout(args.postgres_url, args.alerts, args.runs, "postgresql")
    elif args.postgres:
        from tests.conftest import PrivateCluster

        cluster = PrivateCluster()
        try:
            bench_handout(cluster.start(), args.alerts, args.runs, "postgresql")
        finally:
            cluster.stop()
    bench_images(args.image_runs)


if __name__ == "__main__":
    main()
