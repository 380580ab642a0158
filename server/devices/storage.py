"""Consistency of the clip store with the clip rows: orphans, missing and corrupt files, and upload
spools left by a crash; `trialhouse storage check [--repair]`."""

from __future__ import annotations

import hashlib
import json
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from server import audit
from server.devices.clipstore import ClipStore
from server.devices.models import Clip
from server.settings import Settings


def check(session: Session, settings: Settings, *, verify_hashes: bool = True) -> dict[str, Any]:
    store = ClipStore(settings.clip_dir)
    rows = {c.storage_key: c for c in session.scalars(select(Clip).where(Clip.erased_at.is_(None)))}
    erased = set(session.scalars(select(Clip.storage_key).where(Clip.erased_at.is_not(None))))
    files = set(store.iter_keys())
    # A file without a live row: left by a crash between the rename and the commit, or an erased
    # clip's file that came back. Identical bytes sent after an erasure are stored under the same
    # key for their own live row: that file is no orphan.
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
    return {
        "rows": len(rows),
        "files": len(files),
        "orphans": orphans,
        "missing": missing,
        "corrupt": corrupt,
        "erased_rows": len(erased),
        "erased_but_present": sorted((files & erased) - set(rows)),
        "spools": store.stale_spools(),
    }


def problems(report: dict[str, Any]) -> bool:
    return bool(report["orphans"] or report["missing"] or report["corrupt"] or report["spools"])


def repair(session: Session, settings: Settings, report: dict[str, Any]) -> dict[str, list[str]]:
    """Remove the orphan files and stale spools a check found; missing and corrupt files need a person.

    An orphan younger than the spool grace is left alone: its upload may be committing right now.
    """
    store = ClipStore(settings.clip_dir)
    live = set(session.scalars(select(Clip.storage_key).where(Clip.erased_at.is_(None))))
    removed, young = [], []
    for key in report["orphans"]:
        if key in live:  # a row arrived since the check
            continue
        if store.age_s(key) < store.SPOOL_GRACE_S:
            young.append(key)
        elif store.delete(key):
            removed.append(key)
    spools = store.remove_spools(report["spools"])
    if removed or spools:
        audit.record(
            session,
            "cli",
            "storage.repair",
            "clip",
            None,
            {"orphans_removed": len(removed), "spools_removed": len(spools)},
        )
    return {"orphans_removed": removed, "spools_removed": spools, "orphans_too_young": young}


def run_check(session: Session, settings: Settings, *, as_json: bool, fix: bool) -> int:
    """`trialhouse storage check`: exit 1 when anything is out of place (after ``--repair``, when
    anything is still out of place)."""
    report = check(session, settings)
    fixed = repair(session, settings, report) if fix else None
    if fixed is not None:
        report["repair"] = fixed
        after = dict(
            report,
            orphans=[k for k in report["orphans"] if k not in fixed["orphans_removed"]],
            spools=[k for k in report["spools"] if k not in fixed["spools_removed"]],
        )
    else:
        after = report
    if as_json:
        print(json.dumps(report, default=str))
    else:
        print(f"clips in database: {report['rows']}, files in store: {report['files']}")
        for key in report["orphans"]:
            print(f"orphan file (no row): {key}")
        for key in report["missing"]:
            print(f"missing file (row without file): {key}")
        for key in report["corrupt"]:
            print(f"file whose bytes do not match its SHA-256: {key}")
        for key in report["spools"]:
            print(f"upload spool left by a crash (raw audio): {key}")
        if fixed is not None:
            for key in fixed["orphans_removed"]:
                print(f"removed orphan file: {key}")
            for key in fixed["spools_removed"]:
                print(f"removed upload spool: {key}")
            for key in fixed["orphans_too_young"]:
                print(f"left alone (written in the last {ClipStore.SPOOL_GRACE_S / 60:.0f} minutes): {key}")
        elif report["orphans"] or report["spools"]:
            print("run again with --repair to remove the orphan files and upload spools")
        print("ok" if not problems(after) else "problems found")
    return 1 if problems(after) else 0
