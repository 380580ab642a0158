"""Content-addressed clip files under the data directory.

Bytes are stored exactly as received (reviewers must hear what the device heard). A put writes a
temporary file, fsyncs it, renames it into place and fsyncs the directory, so after a crash a key
either names a complete file or does not exist. Uploads stream into spool files under ``tmp/``;
one left by a crash holds raw audio, so spools older than ``SPOOL_GRACE`` are removed at start-up
and by `trialhouse storage check --repair` / `storage purge --apply`.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import time
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import BinaryIO


class ClipStore:
    # An upload in flight (in this or another worker) writes to its spool every few milliseconds
    # and finishes within its request timeout; a spool untouched for this long was abandoned.
    SPOOL_GRACE_S = 600.0

    def __init__(self, root: Path) -> None:
        self.root = Path(root)
        self.tmp = self.root / "tmp"

    def ensure(self) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        self.tmp.mkdir(parents=True, exist_ok=True)

    @staticmethod
    def key_for(sha256: str) -> str:
        return f"{sha256[:2]}/{sha256[2:4]}/{sha256}"

    def path(self, key: str) -> Path:
        return self.root / key

    def exists(self, key: str) -> bool:
        return self.path(key).is_file()

    def spool(self) -> SpooledUpload:
        """A temporary file in the store's own filesystem, for streaming an upload into."""
        try:
            return SpooledUpload(self)
        except FileNotFoundError:  # the spool directory was removed since start-up
            self.ensure()
            return SpooledUpload(self)

    def put_file(self, tmp_path: Path, sha256: str) -> str:
        """Move an fsynced temporary file into place under its content key; return the key."""
        key = self.key_for(sha256)
        final = self.path(key)
        if final.exists():
            tmp_path.unlink(missing_ok=True)
            return key
        self._make_dirs(final.parent)
        os.replace(tmp_path, final)
        _fsync_dir(final.parent)
        return key

    def _make_dirs(self, path: Path) -> None:
        """Create missing directories and fsync the parent of each, so the new entries survive a crash."""
        missing = []
        while not path.is_dir():
            missing.append(path)
            path = path.parent
        for d in reversed(missing):
            try:
                d.mkdir()
            except FileExistsError:
                pass
            _fsync_dir(d.parent)

    def put_bytes(self, data: bytes) -> tuple[str, str]:
        sha = hashlib.sha256(data).hexdigest()
        with self.spool() as up:
            up.write(data)
            up.finish()
            key = self.put_file(up.path, sha)
        return sha, key

    def delete(self, key: str) -> bool:
        """Remove a clip file; True when it is verified gone."""
        p = self.path(key)
        try:
            p.unlink()
        except FileNotFoundError:
            pass
        _fsync_dir(p.parent) if p.parent.exists() else None
        return not p.exists()

    def iter_keys(self) -> Iterator[str]:
        if not self.root.exists():
            return
        for p in self.root.glob("??/??/*"):
            if p.is_file():
                yield p.relative_to(self.root).as_posix()

    def age_s(self, key: str, now: float | None = None) -> float:
        """Seconds since the file under ``key`` (or ``tmp/<name>``) was last written; 0 if gone."""
        try:
            return (now or time.time()) - self.path(key).stat().st_mtime
        except FileNotFoundError:
            return 0.0

    def stale_spools(self, grace_s: float | None = None) -> list[str]:
        """Spool files (``tmp/<name>``) untouched for ``grace_s`` seconds: left by a crash."""
        grace = self.SPOOL_GRACE_S if grace_s is None else grace_s
        if not self.tmp.is_dir():
            return []
        now = time.time()
        out = []
        for p in sorted(self.tmp.iterdir()):
            key = f"tmp/{p.name}"
            if p.is_file() and self.age_s(key, now) >= grace:
                out.append(key)
        return out

    def remove_spools(self, keys: Iterable[str]) -> list[str]:
        """Delete the given spool files; returns those verified gone."""
        removed = []
        for key in keys:
            if not key.startswith("tmp/") or "/" in key[4:]:
                continue  # only spool files, never a clip
            p = self.path(key)
            p.unlink(missing_ok=True)
            if not p.exists():
                removed.append(key)
        if removed:
            _fsync_dir(self.tmp)
        return removed

    def writable(self) -> bool:
        try:
            self.ensure()
            fd, name = tempfile.mkstemp(dir=self.tmp, prefix="health-")
            os.close(fd)
            os.unlink(name)
            return True
        except OSError:
            return False


class SpooledUpload:
    """Streams bytes to a temp file while hashing and counting them."""

    def __init__(self, store: ClipStore) -> None:
        fd, name = tempfile.mkstemp(dir=store.tmp, prefix="up-")
        self.path = Path(name)
        self._fh: BinaryIO = os.fdopen(fd, "wb")
        self._hash = hashlib.sha256()
        self.size = 0

    def write(self, chunk: bytes) -> None:
        self._fh.write(chunk)
        self._hash.update(chunk)
        self.size += len(chunk)

    @property
    def sha256(self) -> str:
        return self._hash.hexdigest()

    def finish(self) -> None:
        if not self._fh.closed:
            self._fh.flush()
            os.fsync(self._fh.fileno())
            self._fh.close()

    def read_bytes(self) -> bytes:
        self.finish()
        return self.path.read_bytes()

    def discard(self) -> None:
        if not self._fh.closed:
            self._fh.close()
        self.path.unlink(missing_ok=True)

    def __enter__(self) -> SpooledUpload:
        return self

    def __exit__(self, *exc: object) -> None:
        # Whatever was not moved into the store is removed: a rejected upload leaves nothing.
        self.discard()


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
