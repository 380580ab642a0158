"""Consistency of the clip store with the clip rows: orphans, missing and corrupt files."""

from __future__ import annotations

import hashlib
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.devices.clipstore import ClipStore
from server.devices.models import Clip
from server.settings import Settings


def check(session: Session, settings: Settings, *, verify_hashes: bool = True) -> dict[str, Any]:
    store = ClipStore(settings.clip_dir)
    rows = {c.storage_key: c for c in session.scalars(select(Clip).where(Clip.erased_at.is_(None)))}
    erased = set(session.scalars(select(Clip.storage_key).where(Clip.erased_at.is_not(None))))
    files = set(store.iter_keys())
    orphans = sorted(files - set(rows))
    missing = sorted(set(rows) - files)
    corrupt = []
    if verify_hashes:
        for key in sorted(files & set(rows)):
            h = hashlib.sha256()
            with open(store.path(key), "rb") as fh:
                for chunk in iter(lambda: fh.read(1 << 20), b""):
                    h.update(chunk)
            if h.hexdigest() != rows[key].sha256:
                corrupt.append(key)
    return {"rows": len(rows), "files": len(files), "orphans": orphans, "missing": missing,
            "corrupt": corrupt, "erased_rows": len(erased),
            "erased_but_present": sorted(files & erased)}
