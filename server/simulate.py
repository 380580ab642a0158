"""A device simulator: posts heartbeats and alert clips through the HTTP API exactly as a device would.

Clips are synthesised with numpy (server.sounds) and written as standard WAV. A timed-out upload is
retried with the same event_id, so the server's idempotency turns the retry into a duplicate.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import logging
import time
import uuid
from dataclasses import dataclass
from typing import Any

import httpx2
import numpy as np

from server import sounds

log = logging.getLogger(__name__)

CLASS_SOUND = {"smoke_alarm": "smoke_alarm_t3", "baby_cry": "baby_cry", "glass_break": "glass_break"}


@dataclass
class SendResult:
    status: int
    body: dict[str, Any]
    attempts: int


class DeviceSimulator:
    def __init__(
        self,
        base_url: str,
        token: str,
        *,
        client: httpx2.Client | None = None,
        timeout_s: float = 10.0,
        retries: int = 3,
        firmware: str = "sim-1.0",
    ) -> None:
        self.client = client or httpx2.Client(base_url=base_url, timeout=timeout_s)
        self.headers = {"Authorization": f"Bearer {token}"}
        self.retries = retries
        self.firmware = firmware

    def _post(self, path: str, **kw: Any) -> SendResult:
        last: Exception | None = None
        for attempt in range(1, self.retries + 2):
            try:
                r = self.client.post(path, headers=self.headers, **kw)
            except (httpx2.TimeoutException, httpx2.TransportError) as exc:
                last = exc
                time.sleep(min(2.0, 0.2 * 2**attempt))
                continue
            try:
                body = r.json()
            except ValueError:
                body = {"raw": r.text[:200]}
            return SendResult(r.status_code, body, attempt)
        raise RuntimeError(f"{path}: no answer after {self.retries + 1} attempts ({last})")

    def heartbeat(
        self, *, listening: bool = True, sent_at: dt.datetime | None = None, firmware: str | None = None
    ) -> SendResult:
        sent_at = sent_at or dt.datetime.now(dt.UTC)
        return self._post(
            "/api/v1/heartbeats",
            json={
                "sent_at": sent_at.isoformat(),
                "listening": listening,
                "firmware": firmware or self.firmware,
            },
        )

    def send_alert(
        self,
        *,
        clip: bytes,
        sound_class: str,
        score: float,
        detected_at: dt.datetime,
        clip_offset_s: float,
        event_id: str | None = None,
        firmware: str | None = None,
        with_digest: bool = True,
        filename: str = "clip.wav",
    ) -> SendResult:
        meta = {
            "event_id": event_id or uuid.uuid4().hex,
            "sound_class": sound_class,
            "score": round(float(score), 4),
            "detected_at": detected_at.isoformat(),
            "clip_offset_s": round(float(clip_offset_s), 3),
            "firmware": firmware or self.firmware,
        }
        if with_digest:
            meta["clip_sha256"] = hashlib.sha256(clip).hexdigest()
        files = {"meta": (None, json.dumps(meta), "application/json"), "clip": (filename, clip, "audio/wav")}
        return self._post("/api/v1/alerts", files=files)


def synth_clip(
    kind: str, rng: np.random.Generator, *, rate_hz: int = 16000, duration_s: float = 10.0
) -> tuple[bytes, float]:
    return sounds.make_clip(kind, rate_hz=rate_hz, duration_s=duration_s, rng=rng)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--base-url", required=True, help="e.g. http://127.0.0.1:8000")
    p.add_argument("--token", required=True, help="the device's bearer token")
    p.add_argument("--heartbeats", type=int, default=3, help="heartbeats to send (default 3)")
    p.add_argument("--interval", type=float, default=0.0, help="seconds between heartbeats (default 0)")
    p.add_argument("--alerts", type=int, default=1, help="alert clips to send (default 1)")
    p.add_argument("--sound-class", default="smoke_alarm")
    p.add_argument(
        "--sound", help="sound to synthesise (default: the class's own; e.g. bird_screech, tv_babble)"
    )
    p.add_argument("--score", type=float, default=0.9)
    p.add_argument("--firmware", default="sim-1.0")
    p.add_argument("--seed", type=int, default=1)


def main_from_args(args: argparse.Namespace) -> int:
    rng = np.random.default_rng(args.seed)
    sim = DeviceSimulator(args.base_url, args.token, firmware=args.firmware)
    failures = 0
    for i in range(args.heartbeats):
        r = sim.heartbeat()
        print(f"heartbeat {i + 1}: {r.status} {json.dumps(r.body)}")
        failures += r.status >= 300
        if args.interval and i + 1 < args.heartbeats:
            time.sleep(args.interval)
    kind = args.sound or CLASS_SOUND.get(args.sound_class, "smoke_alarm_t3")
    for i in range(args.alerts):
        clip, offset = synth_clip(kind, rng)
        r = sim.send_alert(
            clip=clip,
            sound_class=args.sound_class,
            score=args.score,
            detected_at=dt.datetime.now(dt.UTC),
            clip_offset_s=offset,
        )
        print(f"alert {i + 1} ({kind}): {r.status} {json.dumps(r.body)}")
        failures += r.status >= 300
    return 1 if failures else 0
