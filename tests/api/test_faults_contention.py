"""Personal-data views and exports while devices upload: no 'database is locked', every view audited.

Views of contact details and personal-data exports write an audit row from a GET. On SQLite a GET that
starts reading and later writes can lose the race for the write lock against concurrent uploads; the
handlers take the write lock up front. Here device uploads and coordinator views run at once against a
real server on a committed database (both backends), and every single request must succeed.
"""

from __future__ import annotations

import datetime as dt
import json
import re
import threading
import uuid

import httpx2
from sqlalchemy import func, select

from server.auth.models import AuditEvent
from server.devices.models import Alert
from server.households import service as households_service
from server.settings import Settings
from tests import factories
from tests.api.test_device_alerts import MULTIPART, alert_body, bearer, sine
from tests.conftest import LiveServer, committed_session

N_DEVICES = 4
UPLOADS_PER_DEVICE = 15  # 60 uploads in all
N_VIEWERS = 4
VIEWS_PER_VIEWER = 10  # 40 views in all: contact page, contact API, export page, export API in turn
VIEW_PATHS = (
    "/homes/{code}/contact",
    "/api/v1/homes/{code}/contact",
    "/homes/export-personal.csv?trial={trial}",
    "/api/v1/homes/export-personal.csv?trial={trial}",
)


def _sign_in(c: httpx2.Client, email: str, password: str) -> None:
    page = c.get("/login")
    m = re.search(r'name="csrf_token" value="([^"]+)"', page.text)
    assert m, "login page carries a CSRF token"
    r = c.post("/login", data={"email": email, "password": password, "csrf_token": m.group(1)})
    assert r.status_code == 303, r.text


def test_views_and_exports_never_fail_while_devices_upload(fresh_settings: Settings) -> None:
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        devices = [factories.make_device(s, trial) for _ in range(N_DEVICES)]
        homes = [
            factories.make_installed_home(s, trial, dev, installed_at=now - dt.timedelta(days=5))
            for dev, _ in devices
        ]
        for i, home in enumerate(homes):
            households_service.set_contact(s, home, names=f"Household {i}", phone=f"0100 000 {i:03d}")
        users = [factories.make_user(s, role="coordinator") for _ in range(N_VIEWERS)]
        codes, trial_code = [h.code for h in homes], trial.code
        tokens = [tok for _, tok in devices]
        creds = [(u.email, pw) for u, pw in users]
        audit_before = s.scalar(
            select(func.count(AuditEvent.id)).where(
                AuditEvent.action.in_(("personal.view", "personal.export"))
            )
        )

    n_threads = N_DEVICES + N_VIEWERS
    start = threading.Barrier(n_threads)
    uploads: list[int | str] = []
    views: list[tuple[str, int | str]] = []
    lock = threading.Lock()

    def upload(d: int) -> None:
        with httpx2.Client(base_url=srv.url, timeout=60) as c:
            bodies = [
                alert_body(
                    {
                        "event_id": uuid.uuid4().hex,
                        "sound_class": "smoke_alarm",
                        "score": 0.8,
                        "detected_at": (now - dt.timedelta(seconds=d * 100 + k)).isoformat(),
                        "clip_offset_s": 0.25,
                        "firmware": "3.1.0",
                    },
                    sine(seconds=0.5, seed=1000 + d * 100 + k),
                )
                for k in range(UPLOADS_PER_DEVICE)
            ]
            start.wait()
            for body in bodies:
                try:
                    r = c.post(
                        "/api/v1/alerts",
                        content=body,
                        headers={"Content-Type": MULTIPART, **bearer(tokens[d])},
                    )
                    out: int | str = (
                        r.status_code if r.status_code == 201 else f"{r.status_code} {r.text[:200]}"
                    )
                except httpx2.HTTPError as exc:
                    out = repr(exc)
                with lock:
                    uploads.append(out)

    def view(v: int) -> None:
        with httpx2.Client(base_url=srv.url, timeout=60) as c:
            _sign_in(c, *creds[v])
            start.wait()
            for k in range(VIEWS_PER_VIEWER):
                path = VIEW_PATHS[(v + k) % len(VIEW_PATHS)].format(
                    code=codes[(v + k) % len(codes)], trial=trial_code
                )
                try:
                    r = c.get(path)
                    ok = r.status_code == 200 and (b"Household" in r.content)
                    out: int | str = 200 if ok else f"{r.status_code} {r.text[:200]}"
                except httpx2.HTTPError as exc:
                    out = repr(exc)
                with lock:
                    views.append((path, out))

    with LiveServer(fresh_settings) as srv:
        threads = [threading.Thread(target=upload, args=(d,)) for d in range(N_DEVICES)]
        threads += [threading.Thread(target=view, args=(v,)) for v in range(N_VIEWERS)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(240)
        assert not any(t.is_alive() for t in threads), "a worker did not finish"
        health = httpx2.get(f"{srv.url}/api/v1/health", timeout=10)
    assert health.status_code == 200

    assert len(uploads) == N_DEVICES * UPLOADS_PER_DEVICE
    assert len(views) == N_VIEWERS * VIEWS_PER_VIEWER
    failed_uploads = [u for u in uploads if u != 201]
    failed_views = [(p, o) for p, o in views if o != 200]
    assert failed_uploads == [], f"{len(failed_uploads)} uploads failed: {failed_uploads[:3]}"
    assert failed_views == [], f"{len(failed_views)} views failed: {failed_views[:3]}"

    n_exports = sum(1 for p, _ in views if "export-personal" in p)
    n_contacts = len(views) - n_exports
    with committed_session(fresh_settings) as s:
        assert s.scalar(select(func.count(Alert.id))) == N_DEVICES * UPLOADS_PER_DEVICE
        after = dict(
            s.execute(
                select(AuditEvent.action, func.count(AuditEvent.id))
                .where(AuditEvent.action.in_(("personal.view", "personal.export")))
                .group_by(AuditEvent.action)
            ).all()
        )
    # Every view wrote its own audit row (the fixture's set_contact writes none of these actions).
    assert audit_before == 0
    assert after.get("personal.view", 0) == n_contacts == 20
    assert after.get("personal.export", 0) == n_exports == 20
    json.dumps(after)  # plain counts
