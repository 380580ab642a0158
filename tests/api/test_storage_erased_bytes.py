"""Erased contact details leave no readable bytes in the SQLite database file or its write-ahead log
(``secure_delete`` on every connection, a TRUNCATE checkpoint after the erasure commits).

SQLite only: PostgreSQL keeps dead rows until VACUUM and in its WAL archives and backups, which
the operator rotates (DEVELOPERS.md, "Erasure and the database files").
"""

from __future__ import annotations

from pathlib import Path

from fastapi.testclient import TestClient

from server import migrate
from server.app import create_app
from server.db import make_engine
from server.households import service
from server.settings import Settings
from tests import factories
from tests.conftest import committed_session, csrf_of, sign_in

PHONE = "0161 496 0732"
EMAIL = "marlow.quince@example.test"
ADDRESS = "7 Lantern Yard, Brackwell"


def raw_bytes(db: Path) -> bytes:
    wal = db.with_name(db.name + "-wal")
    return db.read_bytes() + (wal.read_bytes() if wal.exists() else b"")


def test_erased_contact_details_are_not_in_the_database_file_or_its_log(tmp_path: Path) -> None:
    db = tmp_path / "erase.sqlite"
    settings = Settings(
        data_dir=tmp_path / "data", database_url=f"sqlite:///{db}", secret_key="test-secret-key-" + "z" * 32
    )
    engine = make_engine(settings.resolved_database_url())
    migrate.upgrade(engine)
    engine.dispose()
    with committed_session(settings) as s:
        trial = factories.make_trial(s)
        home = factories.make_registered_home(s, trial, state="consented")
        service.set_contact(
            s,
            home,
            names="Marlow Quince",
            address=ADDRESS,
            phone=PHONE,
            email=EMAIL,
            access_notes="side gate",
        )
        user, password = factories.make_user(s, role="coordinator")
        code = home.code
    with TestClient(create_app(settings)) as c:
        sign_in(c, user.email, password)
        c.headers["X-CSRF-Token"] = csrf_of(c)
        # Present before: the test can see them where they are.
        assert c.get(f"/api/v1/homes/{code}/contact").json()["phone"] == PHONE
        before = raw_bytes(db)
        assert PHONE.encode() in before and EMAIL.encode() in before
        plan = c.get(f"/api/v1/homes/{code}/erasure").json()
        r = c.post(f"/api/v1/homes/{code}/erasure", json={"ticket": plan["ticket"], "confirm_code": code})
        assert r.status_code == 200 and r.json()["contact_erased"] is True
        after = raw_bytes(db)
        wal = db.with_name(db.name + "-wal")
        assert not wal.exists() or wal.stat().st_size == 0  # folded into the file and truncated
        for secret in (PHONE, EMAIL, ADDRESS, "Marlow Quince"):
            assert secret.encode() not in after, secret
        # The service keeps working on the same files afterwards.
        assert c.get(f"/api/v1/homes/{code}").status_code == 200
    with committed_session(settings) as s:
        assert s.connection().exec_driver_sql("PRAGMA secure_delete").scalar() == 1
