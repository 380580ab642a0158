"""Benchmark: device ingest (alert clips and heartbeats) against a bare endpoint doing the irreducible work.

Two servers run under uvicorn on 127.0.0.1, each in its own process, on the same database server:

- trialhouse: ``create_app(Settings(...))`` as shipped;
- bare: a Starlette app that looks up the token, parses the multipart body (python-multipart, streamed
  to a temporary file in the store), checks the RIFF/WAVE header, hashes the clip, checks the
  event_id, writes and fsyncs the file (rename, directory fsync) and inserts one row; for heartbeats
  it looks up the token, parses the JSON and updates one row. Same drivers and durability settings.

The load client is a raw-socket HTTP/1.1 keep-alive client in threads: it sends prebuilt bytes
(10 s, 16 kHz mono PCM16 clips of about 320 KB from ``server.sounds.make_clip``; each request patches
the last four samples so every clip is distinct) and reads only the status line and headers, so its
own CPU cost stays small. For 1, 8 and 32 concurrent clients each round measures both sides in
alternating order, after waiting until both server processes are idle; medians over the rounds are
reported with requests/s, p50 and p99 latency, and the ratio trialhouse/bare.
Targets: ratio >= 0.5 for clips and heartbeats, p99 < 250 ms at 32 clients. It asserts nothing.

    python tests/benchmarks/bench_ingest.py [--postgres URL] [--rounds 3] [--seconds 4]
                                            [--clients 1,8,32] [--backends sqlite,postgres]

Without --postgres a private PostgreSQL cluster is started in a temporary directory (initdb and
pg_ctl, as the ``postgres`` user when run as root) with its default durability settings.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import os
import shutil
import socket
import statistics
import struct
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

BOUNDARY = "bench-boundary-5c1e"
MAX_REQUESTS_PER_CLIENT = 20_000  # a bound on every measurement loop, whatever the duration
CLK_TCK = os.sysconf("SC_CLK_TCK")


# =====================================================================================
# The bare server


def bare_app(url: str, root: Path) -> Any:
    import sqlalchemy as sa
    from python_multipart.multipart import MultipartParser, parse_options_header
    from starlette.applications import Starlette
    from starlette.concurrency import run_in_threadpool
    from starlette.requests import Request
    from starlette.responses import JSONResponse
    from starlette.routing import Route

    from server.db import make_engine, writer_engine

    engine = make_engine(url)
    writer = writer_engine(engine)
    meta_sa = sa.MetaData()
    device = sa.Table(
        "bare_device",
        meta_sa,
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("token_hash", sa.String(64), unique=True),
        sa.Column("last_seen_at", sa.Float),
    )
    clip = sa.Table(
        "bare_clip",
        meta_sa,
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("device_id", sa.Integer),
        sa.Column("event_id", sa.String(128)),
        sa.Column("sha256", sa.String(64)),
        sa.Column("size_bytes", sa.Integer),
        sa.Column("received_at", sa.Float),
        sa.UniqueConstraint("device_id", "event_id"),
    )
    tmp = root / "tmp"
    tmp.mkdir(parents=True, exist_ok=True)

    def fsync_dir(d: Path) -> None:
        dfd = os.open(d, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)

    def lookup(token: str) -> int | None:
        with engine.connect() as conn:
            return conn.execute(
                sa.select(device.c.id).where(
                    device.c.token_hash == hashlib.sha256(token.encode()).hexdigest()
                )
            ).scalar()

    def token_of(request: Request) -> str:
        scheme, _, value = request.headers.get("authorization", "").partition(" ")
        return value.strip() if scheme.lower() == "bearer" else ""

    async def alerts(request: Request) -> JSONResponse:
        device_id = await run_in_threadpool(lookup, token_of(request))
        if device_id is None:
            return JSONResponse({"error": {"code": "invalid_token"}}, status_code=401)
        _, params = parse_options_header(request.headers.get("content-type", ""))
        fd, name = tempfile.mkstemp(dir=tmp, prefix="up-")
        fh = os.fdopen(fd, "wb")
        h = hashlib.sha256()
        st: dict[str, Any] = {"name": None, "meta": bytearray(), "head": b"", "hname": b"", "headers": {}}

        def on_header_field(d: bytes, s: int, e: int) -> None:
            st["hname"] += d[s:e]

        def on_header_value(d: bytes, s: int, e: int) -> None:
            st["headers"][st["hname"].lower()] = st["headers"].get(st["hname"].lower(), b"") + d[s:e]

        def on_header_end() -> None:
            st["hname"] = b""

        def on_headers_finished() -> None:
            _, p = parse_options_header(st["headers"].get(b"content-disposition", b""))
            st["name"] = p.get(b"name", b"").decode()
            st["headers"] = {}

        def on_part_data(d: bytes, s: int, e: int) -> None:
            chunk = d[s:e]
            if st["name"] == "clip":
                if len(st["head"]) < 44:
                    st["head"] += chunk[: 44 - len(st["head"])]
                fh.write(chunk)
                h.update(chunk)
            elif st["name"] == "meta":
                st["meta"] += chunk

        parser = MultipartParser(
            params[b"boundary"],
            {
                "on_header_field": on_header_field,
                "on_header_value": on_header_value,
                "on_header_end": on_header_end,
                "on_headers_finished": on_headers_finished,
                "on_part_data": on_part_data,
            },
        )
        async for chunk in request.stream():
            parser.write(chunk)
        parser.finalize()
        head = st["head"]
        ok = (
            head[:4] == b"RIFF"
            and head[8:12] == b"WAVE"
            and head[12:16] == b"fmt "
            and struct.unpack("<HHI", head[20:28]) == (1, 1, 16000)
        )
        if not ok:
            fh.close()
            os.unlink(name)
            return JSONResponse({"error": {"code": "unsupported_audio"}}, status_code=422)
        event_id = json.loads(bytes(st["meta"]))["event_id"]
        sha = h.hexdigest()

        def work() -> tuple[int, bool]:
            fh.flush()
            os.fsync(fh.fileno())
            fh.close()
            with writer.connect() as conn:
                with conn.begin():
                    found = conn.execute(
                        sa.select(clip.c.id).where(clip.c.device_id == device_id, clip.c.event_id == event_id)
                    ).scalar()
                    if found is not None:
                        os.unlink(name)
                        return found, True
                    # The same two-level content layout as the clip store; a new directory's
                    # entry is made durable too (fsync of its parent).
                    final = root / sha[:2] / sha[2:4] / sha
                    for d in (final.parent.parent, final.parent):
                        if not d.is_dir():
                            d.mkdir(exist_ok=True)
                            fsync_dir(d.parent)
                    os.replace(name, final)
                    fsync_dir(final.parent)
                    new_id = conn.execute(
                        clip.insert().values(
                            device_id=device_id,
                            event_id=event_id,
                            sha256=sha,
                            size_bytes=final.stat().st_size,
                            received_at=time.time(),
                        )
                    ).inserted_primary_key[0]
                    return int(new_id), False

        alert_id, dup = await run_in_threadpool(work)
        return JSONResponse({"alert_id": alert_id, "duplicate": dup}, status_code=200 if dup else 201)

    async def heartbeats(request: Request) -> JSONResponse:
        device_id = await run_in_threadpool(lookup, token_of(request))
        if device_id is None:
            return JSONResponse({"error": {"code": "invalid_token"}}, status_code=401)
        body = json.loads(await request.body())
        if not isinstance(body.get("listening"), bool):
            return JSONResponse({"error": {"code": "invalid_request"}}, status_code=422)

        def work() -> None:
            with writer.connect() as conn:
                with conn.begin():
                    conn.execute(
                        device.update().where(device.c.id == device_id).values(last_seen_at=time.time())
                    )

        await run_in_threadpool(work)
        return JSONResponse({"received_at": dt.datetime.now(dt.UTC).isoformat(), "next_heartbeat_s": 60})

    return (
        Starlette(
            routes=[
                Route("/api/v1/alerts", alerts, methods=["POST"]),
                Route("/api/v1/heartbeats", heartbeats, methods=["POST"]),
            ]
        ),
        meta_sa,
        device,
    )


def serve(kind: str, url: str, data_dir: Path, port: int) -> None:
    import uvicorn

    if kind == "bare":
        app = bare_app(url, data_dir / "clips")[0]
    else:
        from server.app import create_app
        from server.settings import Settings

        app = create_app(Settings(data_dir=data_dir, database_url=url, secret_key="bench-" + "k" * 40))
    uvicorn.run(app, host="127.0.0.1", port=port, log_level="warning", access_log=False)


# =====================================================================================
# Setting up both databases


def prepare(th_url: str, bare_url: str, th_dir: Path, bare_dir: Path, n_devices: int) -> list[str]:
    from server import migrate
    from server.db import make_engine, make_session_factory, session_scope
    from server.devices import service as devices_service
    from server.trials import service as trials_service

    engine = make_engine(th_url)
    migrate.upgrade(engine)
    tokens = []
    with session_scope(make_session_factory(engine)) as s:
        trial = trials_service.create_trial(
            s,
            code="BENCH",
            name="Benchmark",
            starts_on=dt.date(2026, 1, 1),
            sound_classes=["smoke_alarm", "baby_cry", "glass_break"],
        )
        for i in range(n_devices):
            _, tok = devices_service.register_device(s, serial=f"BN-{i:03d}", trial=trial)
            tokens.append(tok)
    engine.dispose()
    _, meta_sa, device = bare_app(bare_url, bare_dir / "clips")
    engine = make_engine(bare_url)
    meta_sa.create_all(engine)
    with engine.begin() as conn:
        conn.execute(
            device.insert(),
            [
                {"id": i + 1, "token_hash": hashlib.sha256(t.encode()).hexdigest()}
                for i, t in enumerate(tokens)
            ],
        )
    engine.dispose()
    return tokens


# =====================================================================================
# The load client


class Conn:
    """One keep-alive HTTP/1.1 connection; reads the status line, headers and a small body."""

    def __init__(self, port: int) -> None:
        self.port = port
        self.sock: socket.socket | None = None

    def _connect(self) -> socket.socket:
        s = socket.create_connection(("127.0.0.1", self.port), timeout=60)
        s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return s

    def request(self, pieces: list[bytes | memoryview]) -> tuple[int, bytes]:
        if self.sock is None:
            self.sock = self._connect()
        sock = self.sock
        for p in pieces:
            sock.sendall(p)
        buf = b""
        while b"\r\n\r\n" not in buf:
            chunk = sock.recv(65536)
            if not chunk:
                raise ConnectionError("server closed the connection")
            buf += chunk
        head, _, rest = buf.partition(b"\r\n\r\n")
        status = int(head[9:12])
        lower = head.lower()
        length = 0
        for line in lower.split(b"\r\n")[1:]:
            if line.startswith(b"content-length:"):
                length = int(line[15:])
        while len(rest) < length:
            chunk = sock.recv(65536)
            if not chunk:
                raise ConnectionError("server closed the connection")
            rest += chunk
        if b"connection: close" in lower:
            sock.close()
            self.sock = None
        return status, rest

    def close(self) -> None:
        if self.sock is not None:
            self.sock.close()
            self.sock = None


class ClipRequests:
    """Prebuilt multipart pieces; each request gets its own event_id and distinct clip bytes."""

    def __init__(self, clips: list[bytes], token: str, port: int, tag: str) -> None:
        self.clips = [memoryview(c) for c in clips]
        self.token, self.port, self.tag = token, port, tag
        self.clip_head = (
            f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="clip"; filename="c.wav"\r\n'
            f"Content-Type: audio/wav\r\n\r\n"
        ).encode()
        self.tail = f"\r\n--{BOUNDARY}--\r\n".encode()
        self.n = 0

    def next(self) -> list[bytes | memoryview]:
        self.n += 1
        clip = self.clips[self.n % len(self.clips)]
        meta = json.dumps(
            {
                "event_id": f"{self.tag}-{self.n}",
                "sound_class": "smoke_alarm",
                "score": 0.9,
                "detected_at": dt.datetime.now(dt.UTC).isoformat(),
                "clip_offset_s": 1.0,
                "firmware": "bench-1",
            }
        )
        meta_part = (
            f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="meta"\r\n\r\n{meta}\r\n'
        ).encode()
        unique = struct.pack("<Q", hash((self.tag, self.n)) & 0xFFFFFFFFFFFFFFFF)  # the last 4 samples
        length = len(meta_part) + len(self.clip_head) + len(clip) + len(self.tail)
        head = (
            f"POST /api/v1/alerts HTTP/1.1\r\nHost: 127.0.0.1:{self.port}\r\n"
            f"Authorization: Bearer {self.token}\r\n"
            f"Content-Type: multipart/form-data; boundary={BOUNDARY}\r\nContent-Length: {length}\r\n\r\n"
        )
        return [head.encode() + meta_part + self.clip_head, clip[:-8], unique + self.tail]


class BeatRequests:
    def __init__(self, token: str, port: int) -> None:
        self.token, self.port = token, port

    def next(self) -> list[bytes | memoryview]:
        body = json.dumps(
            {"sent_at": dt.datetime.now(dt.UTC).isoformat(), "listening": True, "firmware": "bench-1"}
        ).encode()
        head = (
            f"POST /api/v1/heartbeats HTTP/1.1\r\nHost: 127.0.0.1:{self.port}\r\n"
            f"Authorization: Bearer {self.token}\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\n\r\n"
        ).encode()
        return [head + body]


@dataclass
class Result:
    rps: float
    p50_ms: float
    p99_ms: float
    errors: int
    requests: int


def measure(
    port: int,
    kind: str,
    tokens: list[str],
    clips: list[bytes],
    clients: int,
    seconds: float,
    warmup: float,
    tag: str,
) -> Result:
    expected = 201 if kind == "clip" else 200
    barrier = threading.Barrier(clients + 1)
    t_box: dict[str, float] = {}
    lat: list[list[float]] = [[] for _ in range(clients)]
    errors = [0] * clients

    def worker(i: int) -> None:
        conn = Conn(port)
        gen: Any = (
            ClipRequests(clips, tokens[i], port, f"{tag}-{i}")
            if kind == "clip"
            else BeatRequests(tokens[i], port)
        )
        barrier.wait()
        start, end = t_box["start"], t_box["end"]
        try:
            for _ in range(MAX_REQUESTS_PER_CLIENT):
                pieces = gen.next()
                t0 = time.perf_counter()
                if t0 >= end:
                    break
                try:
                    status, _ = conn.request(pieces)
                except (OSError, ConnectionError, ValueError):
                    conn.close()
                    status = 0
                t1 = time.perf_counter()
                if t0 >= start and t1 <= end:
                    if status == expected:
                        lat[i].append(t1 - t0)
                    else:
                        errors[i] += 1
        finally:
            conn.close()

    threads = [threading.Thread(target=worker, args=(i,), daemon=True) for i in range(clients)]
    for t in threads:
        t.start()
    now = time.perf_counter()
    t_box["start"], t_box["end"] = now + warmup, now + warmup + seconds
    barrier.wait()
    for t in threads:
        t.join(seconds + warmup + 120)
    all_lat = sorted(x for ls in lat for x in ls)
    n = len(all_lat)
    if n == 0:
        return Result(0.0, float("nan"), float("nan"), sum(errors), 0)
    return Result(
        rps=n / seconds,
        p50_ms=1000 * all_lat[n // 2],
        p99_ms=1000 * all_lat[min(n - 1, int(0.99 * n))],
        errors=sum(errors),
        requests=n,
    )


# =====================================================================================
# Orchestration


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def cpu_ticks(pid: int) -> int:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return int(fields[11]) + int(fields[12])  # utime + stime


def wait_idle(pids: list[int], limit_s: float = 300.0) -> float:
    """Wait until the servers use under 5 % of a core over half a second (background work drained)."""
    t0 = time.time()
    while time.time() - t0 < limit_s:
        before = [cpu_ticks(p) for p in pids]
        time.sleep(0.5)
        used = max(cpu_ticks(p) - b for p, b in zip(pids, before, strict=True)) / CLK_TCK
        if used < 0.025:
            break
    return time.time() - t0


def start_server(kind: str, url: str, data_dir: Path) -> tuple[subprocess.Popen[bytes], int]:
    port = free_port()
    cmd = [
        sys.executable,
        str(Path(__file__).resolve()),
        "--serve",
        kind,
        "--url",
        url,
        "--data-dir",
        str(data_dir),
        "--port",
        str(port),
    ]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env)
    deadline = time.time() + 60
    while time.time() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"{kind} server exited with {proc.returncode}")
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            return proc, port
        except OSError:
            time.sleep(0.1)
    proc.terminate()
    raise RuntimeError(f"{kind} server did not start")


def stop_server(proc: subprocess.Popen[bytes]) -> None:
    proc.terminate()
    try:
        proc.wait(20)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)


def clear_clip_files(data_dir: Path) -> None:
    """Between measurements: keep the disk small. Rows and bucket directories stay; files and caches go."""
    for f in (data_dir / "clips").glob("??/??/*"):
        f.unlink(missing_ok=True)
    shutil.rmtree(data_dir / "cache", ignore_errors=True)


@dataclass
class Cell:
    th: list[Result] = field(default_factory=list)
    bare: list[Result] = field(default_factory=list)


def med(values: list[float]) -> float:
    return statistics.median(values)


def run_backend(
    name: str, th_url: str, bare_url: str, work: Path, args: argparse.Namespace, clips: list[bytes]
) -> dict[tuple[str, int], Cell]:
    th_dir, bare_dir = work / f"{name}-th", work / f"{name}-bare"
    max_clients = max(args.clients)
    tokens = prepare(th_url, bare_url, th_dir, bare_dir, max_clients)
    th, th_port = start_server("trialhouse", th_url, th_dir)
    bare, bare_port = start_server("bare", bare_url, bare_dir)
    cells: dict[tuple[str, int], Cell] = {}
    try:
        for kind in ("clip", "heartbeat"):
            for clients in args.clients:
                cell = cells.setdefault((kind, clients), Cell())
                for rnd in range(args.rounds):
                    order = [("th", th_port, th_dir), ("bare", bare_port, bare_dir)]
                    if rnd % 2:
                        order.reverse()
                    for side, port, d in order:
                        wait_idle([th.pid, bare.pid])
                        res = measure(
                            port,
                            kind,
                            tokens,
                            clips,
                            clients,
                            args.seconds,
                            args.warmup,
                            tag=f"{name}-{side}-{kind}-{clients}-{rnd}",
                        )
                        (cell.th if side == "th" else cell.bare).append(res)
                        print(
                            f"  {name:8s} {kind:9s} c={clients:<2d} round {rnd + 1} {side:4s} "
                            f"{res.rps:8.1f} req/s  p50 {res.p50_ms:7.1f} ms  p99 {res.p99_ms:7.1f} ms"
                            f"  errors {res.errors}",
                            flush=True,
                        )
                        if kind == "clip":
                            wait_idle([th.pid, bare.pid])
                            clear_clip_files(d)
    finally:
        stop_server(th)
        stop_server(bare)
    return cells


def report(name: str, cells: dict[tuple[str, int], Cell]) -> list[str]:
    lines = [
        f"{name}:",
        f"  {'kind':9s} {'clients':>7s} | {'trialhouse req/s':>16s} {'p50 ms':>7s} {'p99 ms':>7s} | "
        f"{'bare req/s':>10s} {'p50 ms':>7s} {'p99 ms':>7s} | {'ratio':>5s}  targets",
    ]
    for (kind, clients), c in cells.items():
        th_rps, bare_rps = med([r.rps for r in c.th]), med([r.rps for r in c.bare])
        th_p50, th_p99 = med([r.p50_ms for r in c.th]), med([r.p99_ms for r in c.th])
        b_p50, b_p99 = med([r.p50_ms for r in c.bare]), med([r.p99_ms for r in c.bare])
        ratio = th_rps / bare_rps if bare_rps else float("nan")
        ok = ratio >= 0.5 and (clients < 32 or th_p99 < 250)
        errs = sum(r.errors for r in c.th + c.bare)
        lines.append(
            f"  {kind:9s} {clients:7d} | {th_rps:16.1f} {th_p50:7.1f} {th_p99:7.1f} | "
            f"{bare_rps:10.1f} {b_p50:7.1f} {b_p99:7.1f} | {ratio:5.2f}  "
            f"{'met' if ok else 'MISSED'}{f'  ({errs} errors)' if errs else ''}"
        )
    return lines


class BenchCluster:
    """A private PostgreSQL cluster with default durability (fsync and synchronous commit on)."""

    def __init__(self) -> None:
        from tests.conftest import PrivateCluster

        self.inner = PrivateCluster()

    def start(self) -> str:
        c = self.inner
        r = c._run(c.initdb, "-D", str(c.data), "-U", "trialhouse", "--auth=trust", "--encoding=UTF8")
        if r.returncode:
            raise RuntimeError(f"initdb failed: {r.stderr.strip()}")
        opts = f"-p {c.port} -k {c.dir} -c listen_addresses=127.0.0.1 -c max_connections=200"
        r = c._run(
            c.pg_ctl, "-D", str(c.data), "-o", opts, "-l", str(c.dir / "log"), "-w", "-t", "60", "start"
        )
        if r.returncode:
            raise RuntimeError(f"pg_ctl start failed: {r.stderr.strip()}")
        return f"postgresql+psycopg://trialhouse@127.0.0.1:{c.port}/postgres"

    def stop(self) -> None:
        self.inner.stop()


def pg_databases(admin_url: str) -> tuple[str, str]:
    from tests.conftest import _pg_create

    return _pg_create(admin_url, "bench_trialhouse"), _pg_create(admin_url, "bench_bare")


def make_clips(n: int) -> list[bytes]:
    import numpy as np

    from server import sounds

    rng = np.random.default_rng(2026)
    kinds = ["smoke_alarm_t3", "baby_cry", "glass_break", "dog_bark"]
    return [
        sounds.make_clip(kinds[i % len(kinds)], rate_hz=16000, duration_s=10.0, rng=rng)[0] for i in range(n)
    ]


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--postgres", help="PostgreSQL admin URL (default: start a private cluster)")
    p.add_argument("--backends", default="sqlite,postgres")
    p.add_argument("--clients", default="1,8,32")
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--seconds", type=float, default=4.0)
    p.add_argument("--warmup", type=float, default=0.5)
    p.add_argument("--serve", choices=["trialhouse", "bare"], help=argparse.SUPPRESS)
    p.add_argument("--url", help=argparse.SUPPRESS)
    p.add_argument("--data-dir", help=argparse.SUPPRESS)
    p.add_argument("--port", type=int, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.serve:
        serve(args.serve, args.url, Path(args.data_dir), args.port)
        return 0
    args.clients = [int(x) for x in args.clients.split(",")]
    args.rounds = max(3, args.rounds)
    backends = [b.strip() for b in args.backends.split(",") if b.strip()]
    clips = make_clips(8)
    print(
        f"clips: {len(clips)} distinct 10 s 16 kHz mono PCM16 WAVs of {len(clips[0])} bytes; "
        f"{args.rounds} rounds x {args.seconds:g} s per side; "
        f"{os.cpu_count()} CPUs",
        flush=True,
    )
    out: list[str] = []
    with tempfile.TemporaryDirectory(prefix="trialhouse-bench-") as tmp:
        work = Path(tmp)
        if "sqlite" in backends:
            cells = run_backend(
                "sqlite",
                f"sqlite:///{work / 'th.sqlite'}",
                f"sqlite:///{work / 'bare.sqlite'}",
                work,
                args,
                clips,
            )
            out += report("SQLite (WAL, synchronous=FULL)", cells)
        if "postgres" in backends:
            cluster = None
            admin = args.postgres
            try:
                if admin is None:
                    cluster = BenchCluster()
                    admin = cluster.start()
                th_url, bare_url = pg_databases(admin)
                cells = run_backend("postgres", th_url, bare_url, work, args, clips)
                out += report("PostgreSQL", cells)
            except RuntimeError as exc:
                out.append(f"PostgreSQL: not run ({exc})")
            finally:
                if cluster is not None:
                    cluster.stop()
    print()
    print("\n".join(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
