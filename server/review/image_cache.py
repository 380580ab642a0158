"""Review images on disk: computed once per clip, kept under the data directory's cache.

Files are keyed by the clip's SHA-256, so alerts sharing a clip share its images. Each file
is written to a temporary name and renamed into place; the metadata file is written last, so
its presence means both images are complete.
"""

from __future__ import annotations

import json
import logging
import os
import tempfile
import threading
from pathlib import Path
from typing import Any

from server.devices import audio
from server.devices.clipstore import ClipStore
from server.devices.models import Clip
from server.review import images

log = logging.getLogger(__name__)

KINDS = {"waveform": "wave.png", "spectrogram": "spec.png"}
_locks: dict[str, threading.Lock] = {}
_locks_guard = threading.Lock()


def cache_root(cache_dir: Path) -> Path:
    return Path(cache_dir) / "review-images" / f"v{images.ImageMeta.__dataclass_fields__['version'].default}"


def _base(cache_dir: Path, sha256: str) -> Path:
    return cache_root(cache_dir) / sha256[:2] / sha256


def path_for(cache_dir: Path, sha256: str, kind: str) -> Path:
    if kind == "meta":
        return _base(cache_dir, sha256).with_suffix(".json")
    return Path(f"{_base(cache_dir, sha256)}.{KINDS[kind]}")


def _write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _lock(sha256: str) -> threading.Lock:
    with _locks_guard:
        return _locks.setdefault(sha256, threading.Lock())


def cached_meta(cache_dir: Path, sha256: str) -> images.ImageMeta | None:
    p = path_for(cache_dir, sha256, "meta")
    try:
        return images.ImageMeta.from_json(json.loads(p.read_text()))
    except (FileNotFoundError, ValueError, TypeError, KeyError):
        return None


def ensure(cache_dir: Path, sha256: str, source: Path) -> images.ImageMeta:
    """The clip's image metadata, computing and caching both images first if needed."""
    meta = cached_meta(cache_dir, sha256)
    if meta is not None:
        return meta
    with _lock(sha256):
        meta = cached_meta(cache_dir, sha256)
        if meta is not None:
            return meta
        samples, rate = audio.decode_mono(source)
        out = images.render_clip_images(samples, rate)
        _write(path_for(cache_dir, sha256, "waveform"), out.waveform_png)
        _write(path_for(cache_dir, sha256, "spectrogram"), out.spectrogram_png)
        _write(path_for(cache_dir, sha256, "meta"), json.dumps(out.meta.to_json()).encode())
        return out.meta


def ensure_clip(cache_dir: Path, store: ClipStore, clip: Clip) -> images.ImageMeta:
    return ensure(cache_dir, clip.sha256, store.path(clip.storage_key))


def forget(cache_dir: Path, sha256: str) -> int:
    """Delete a clip's cached images (on erasure or purge); returns the number of files removed."""
    removed = 0
    for kind in (*KINDS, "meta"):
        p = path_for(cache_dir, sha256, kind)
        try:
            p.unlink()
            removed += 1
        except FileNotFoundError:
            pass
    return removed


def _precompute(app: Any, sha256: str, storage_key: str) -> None:
    store: ClipStore = app.state.clip_store
    if cached_meta(app.state.settings.cache_dir, sha256) is not None or not store.exists(storage_key):
        return
    ensure(app.state.settings.cache_dir, sha256, store.path(storage_key))


def schedule(app: Any, sha256s: list[str]) -> None:
    """Compute images for these clips on the app's background worker unless already cached."""
    executor = getattr(app.state, "background", None)
    if executor is None:
        return
    cache_dir = app.state.settings.cache_dir
    for sha in sha256s:
        if cached_meta(cache_dir, sha) is not None:
            continue
        try:
            executor.submit(_safe, _precompute, app, sha, ClipStore.key_for(sha))
        except RuntimeError:  # shutting down
            return


def _safe(fn: Any, *args: Any) -> None:
    try:
        fn(*args)
    except Exception:
        log.exception("could not compute review images for %s", args[1:])
