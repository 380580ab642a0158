"""Benchmark: device heartbeat latency while the sign-in form is flooded with wrong passwords.

A Trialhouse server runs under uvicorn on 127.0.0.1 in its own process, over a fresh SQLite database
(or --postgres URL). One device sends ``--beats`` (200) heartbeats on one connection, one every
``--interval-ms`` (50; 0 sends them back to back), and the client times each: first with nothing
else going on, then while ``--threads`` (4) threads POST /login with wrong passwords, spread over
many accounts (real and unknown e-mails) and many client addresses (each connection binds its own
127.0.x.y source address, which is the address the server sees). It prints median and p95 heartbeat
latency for both phases, their ratios (flood/quiet), and how the sign-in attempts were answered (401
wrong password, 429 throttled or busy). It asserts nothing; single runs on a 2-core machine vary by
a quarter.

    python tests/benchmarks/bench_signin_flood.py [--beats 200] [--interval-ms 50] [--threads 4]
                                                  [--postgres URL]

Figures, 2-core development machine, SQLite, 4 December 2026, 200 heartbeats 50 ms apart per phase
(3 runs before, 4 after; sign-in attempts: 401 wrong password, 429 refused by the throttle):

    Argon2 on the shared worker threads (before): quiet median 5.3-5.5 ms, p95 6.0-6.3 ms;
        flood median 8.5-8.9 ms, p95 17.1-18.7 ms; ratio median 1.56-1.66, p95 2.82-3.03;
        116-121 attempts in 12.3 s, 2 of them 429. (Back to back instead of paced, one run:
        quiet 2.3 / 2.6 ms, flood 4.4 / 12.7 ms, ratio median 1.92, p95 4.87.)
    Argon2 on its own threads at nice 10 (server/auth/service.py, after; 4 runs): quiet median
        4.9-5.3 ms, p95 6.0-7.5 ms; flood median 6.3-6.7 ms, p95 11.8-14.5 ms; ratio median
        1.23-1.33, p95 1.61-2.33; 109-113 attempts in 12.3 s, 1-2 of them 429. (Back to back,
        one run: quiet 2.4 / 2.8 ms, flood 2.4 / 8.6 ms, ratio median 1.02, p95 3.08; a phase of
        under a second, so the paced figures are the ones to compare.)

What is left was not taken apart; the flood's own request handling (the sign-in page rendered again,
strike and audit rows written) shares the two cores with the device calls and with this client's
threads. PostgreSQL was not measured.
"""

from __future__ import annotations

import argparse
import datetime as dt
import http.client
import json
import os
import random
import re
import statistics
import sys
import tempfile
import threading
import time
import urllib.parse
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tests.benchmarks import bench_ingest  # noqa: E402 (after the path is set)

ACCOUNTS = 30


def prepare(url: str) -> tuple[str, list[str]]:
    """A migrated database with one trial, one device and ACCOUNTS staff accounts."""
    from server import migrate
    from server.auth import service as auth_service
    from server.db import make_engine, make_session_factory, session_scope
    from server.devices import service as devices_service
    from server.trials import service as trials_service

    engine = make_engine(url)
    migrate.upgrade(engine)
    with session_scope(make_session_factory(engine)) as s:
        trial = trials_service.create_trial(
            s, code="FLOOD", name="Flood bench", starts_on=dt.date(2026, 1, 1), sound_classes=["smoke_alarm"]
        )
        _, token = devices_service.register_device(s, serial="FL-001", trial=trial)
        emails = []
        for i in range(ACCOUNTS):
            user = auth_service.create_user(
                s,
                email=f"staff{i}@flood.invalid",
                name=f"Staff {i}",
                role="coordinator",
                password=f"a long right password {i}",
            )
            emails.append(user.email)
    engine.dispose()
    return token, emails


def heartbeats(port: int, token: str, n: int, interval_s: float = 0.0) -> tuple[list[float], Counter[int]]:
    """``n`` heartbeats on one keep-alive connection, one every ``interval_s`` (or back to back):
    latencies in seconds and statuses."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=60)
    latencies, statuses = [], Counter[int]()
    start = time.perf_counter()
    for i in range(n):
        time.sleep(max(0.0, start + i * interval_s - time.perf_counter()))  # pacing, not synchronisation
        body = json.dumps(
            {"sent_at": dt.datetime.now(dt.UTC).isoformat(), "listening": True, "firmware": "fl-1.0"}
        )
        t0 = time.perf_counter()
        conn.request(
            "POST",
            "/api/v1/heartbeats",
            body=body,
            headers={"Authorization": f"Bearer {token}", "Content-Type": "application/json"},
        )
        r = conn.getresponse()
        r.read()
        latencies.append(time.perf_counter() - t0)
        statuses[r.status] += 1
    conn.close()
    return latencies, statuses


class Flooder(threading.Thread):
    """POSTs /login with wrong passwords, changing account and source address as it goes."""

    def __init__(self, port: int, emails: list[str], seed: int, stop: threading.Event) -> None:
        super().__init__(daemon=True)
        self.port, self.emails, self.stop = port, emails, stop
        self.rng = random.Random(seed)
        self.statuses: Counter[int] = Counter()
        self.errors = 0

    def _form_token(self, conn: http.client.HTTPConnection) -> tuple[str, str]:
        conn.request("GET", "/login")
        r = conn.getresponse()
        page = r.read().decode()
        cookie = (r.getheader("set-cookie") or "").split(";")[0]
        m = re.search(r'name="csrf_token" value="([^"]+)"', page)
        if not m or not cookie:
            raise RuntimeError("the sign-in page gave no form token")
        return cookie, m.group(1)

    def run(self) -> None:
        while not self.stop.is_set():
            address = f"127.0.{self.rng.randint(0, 255)}.{self.rng.randint(2, 254)}"
            conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=60, source_address=(address, 0))
            try:
                cookie, csrf = self._form_token(conn)
                for _ in range(5):  # a few guesses per address, then a new one
                    if self.stop.is_set():
                        break
                    email = (
                        self.rng.choice(self.emails)
                        if self.rng.random() < 0.7
                        else f"nobody{self.rng.randint(0, 10**6)}@flood.invalid"
                    )
                    form = urllib.parse.urlencode(
                        {"email": email, "password": f"wrong {self.rng.random()}", "csrf_token": csrf}
                    )
                    conn.request(
                        "POST",
                        "/login",
                        body=form,
                        headers={"Content-Type": "application/x-www-form-urlencoded", "Cookie": cookie},
                    )
                    r = conn.getresponse()
                    r.read()
                    self.statuses[r.status] += 1
            except (OSError, http.client.HTTPException, RuntimeError):
                self.errors += 1
            finally:
                conn.close()


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(q * (len(ordered) - 1))))]


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--beats", type=int, default=200)
    p.add_argument("--threads", type=int, default=4)
    p.add_argument("--interval-ms", type=float, default=50.0, help="time between heartbeats (default 50)")
    p.add_argument("--postgres", help="PostgreSQL URL (an empty database) instead of SQLite")
    args = p.parse_args()

    with tempfile.TemporaryDirectory(prefix="th-flood-") as tmp:
        data_dir = Path(tmp) / "data"
        data_dir.mkdir()
        url = args.postgres or f"sqlite:///{data_dir / 'trialhouse.sqlite'}"
        token, emails = prepare(url)
        # The server process is bench_ingest's: create_app(Settings(...)) as shipped, under uvicorn.
        proc, port = bench_ingest.start_server("trialhouse", url, data_dir)
        try:
            heartbeats(port, token, 20)  # warm up: imports, first connections
            quiet, quiet_status = heartbeats(port, token, args.beats, args.interval_ms / 1000)
            stop = threading.Event()
            flood_t0 = time.perf_counter()
            flooders = [Flooder(port, emails, seed, stop) for seed in range(args.threads)]
            for f in flooders:
                f.start()
            time.sleep(2.0)  # let the flood build its queue before measuring
            t0 = time.perf_counter()
            flood, flood_status = heartbeats(port, token, args.beats, args.interval_ms / 1000)
            flood_s = time.perf_counter() - t0
            stop.set()
            for f in flooders:
                f.join(timeout=90)
            flood_total_s = time.perf_counter() - flood_t0
        finally:
            bench_ingest.stop_server(proc)

    signins: Counter[int] = Counter()
    for f in flooders:
        signins.update(f.statuses)
    q50, q95 = statistics.median(quiet), percentile(quiet, 0.95)
    f50, f95 = statistics.median(flood), percentile(flood, 0.95)
    print(
        f"backend: {'postgres' if args.postgres else 'sqlite'}; {args.beats} heartbeats per phase; "
        f"{args.threads} flood threads; {os.cpu_count()} cores"
    )
    print(f"quiet: median {q50 * 1000:.1f} ms, p95 {q95 * 1000:.1f} ms, statuses {dict(quiet_status)}")
    print(
        f"flood: median {f50 * 1000:.1f} ms, p95 {f95 * 1000:.1f} ms, statuses {dict(flood_status)} "
        f"({flood_s:.1f} s)"
    )
    print(f"ratio flood/quiet: median {f50 / q50:.2f}, p95 {f95 / q95:.2f}")
    total = sum(signins.values())
    print(
        f"sign-in attempts: {total} in {flood_total_s:.1f} s ({dict(sorted(signins.items()))}); "
        f"429: {signins.get(429, 0)}; "
        f"connection errors: {sum(f.errors for f in flooders)}"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
