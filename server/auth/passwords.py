"""Argon2id password hashing (argon2-cffi defaults, RFC 9106 parameters) and the password rule."""

from __future__ import annotations

import functools
from importlib import resources

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError

_hasher = PasswordHasher()

MIN_PASSWORD_LENGTH = 12
MAX_PASSWORD_LENGTH = 1024  # Argon2 takes any length; this only bounds the work one request can ask for.


def hash_password(password: str) -> str:
    return _hasher.hash(password)


def verify_password(password_hash: str, password: str) -> bool:
    try:
        return _hasher.verify(password_hash, password)
    except (VerificationError, InvalidHashError):
        return False


@functools.cache
def common_passwords() -> frozenset[str]:
    """The shipped list of well-known weak passwords, lower-cased."""
    text = resources.files("server.auth").joinpath("common_passwords.txt").read_text(encoding="utf-8")
    return frozenset(
        line.strip().lower() for line in text.splitlines() if line.strip() and not line.startswith("#")
    )


def password_problem(password: str) -> str | None:
    """The sentence saying why ``password`` may not be used, or None when it may."""
    if len(password) < MIN_PASSWORD_LENGTH:
        return f"The password needs at least {MIN_PASSWORD_LENGTH} characters."
    if len(password) > MAX_PASSWORD_LENGTH:
        return f"The password may have at most {MAX_PASSWORD_LENGTH} characters."
    if password.strip().lower() in common_passwords():
        return "That password is on the list of commonly used passwords; choose another."
    return None


# Verified against when the e-mail is unknown, so both paths cost the same time.
DUMMY_HASH = _hasher.hash("not-a-real-password-for-timing")
