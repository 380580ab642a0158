"""Argon2id password hashing (argon2-cffi defaults, RFC 9106 parameters)."""

from __future__ import annotations

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError

_hasher = PasswordHasher()

MIN_PASSWORD_LENGTH = 10


def hash_password(password: str) -> str:
    return _hasher.hash(password)


def verify_password(password_hash: str, password: str) -> bool:
    try:
        return _hasher.verify(password_hash, password)
    except (VerificationError, InvalidHashError):
        return False


# Verified against when the e-mail is unknown, so both paths cost the same time.
DUMMY_HASH = _hasher.hash("not-a-real-password-for-timing")
