"""Random bearer tokens: shown once, stored only as a SHA-256 digest."""

from __future__ import annotations

import hashlib
import secrets

DEVICE_PREFIX = "thd_"
STAFF_PREFIX = "ths_"


def new_token(prefix: str) -> str:
    # 32 random bytes (256 bits), URL-safe.
    return prefix + secrets.token_urlsafe(32)


def token_digest(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()
