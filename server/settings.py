"""Typed settings, read once from TRIALHOUSE_* environment variables.

Nothing here connects to anything; ``create_app(settings)`` and the CLI do that.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from server.errors import AppError

MIN_SECRET_KEY_BYTES = 32
# Values people paste from examples and tutorials; compared case-insensitively, ignoring - _ and spaces.
PLACEHOLDER_KEYS = frozenset(
    {
        "changeme",
        "changemenow",
        "changethis",
        "changeit",
        "replaceme",
        "replacethis",
        "secret",
        "secretkey",
        "mysecretkey",
        "yoursecretkey",
        "yoursecretkeyhere",
        "supersecret",
        "supersecretkey",
        "placeholder",
        "insertsecrethere",
        "putyoursecrethere",
        "generateme",
        "xxx",
        "todo",
        "fixme",
        "default",
        "development",
        "devkey",
        "devsecret",
        "test",
        "testkey",
        "notsecret",
        "password",
        "trialhouse",
        "trialhousesecret",
        "trialhousesecretkey",
    }
)


class InsecureSecretKey(AppError):
    code, status = "insecure_secret_key", 500


def check_secret_key(key: str) -> None:
    """Raise ``InsecureSecretKey`` (a one-line message) for a placeholder or too-short key."""
    squashed = "".join(ch for ch in key.lower() if ch not in "-_ .").strip()
    hint = (
        "generate one with: python3 -c 'import secrets; print(secrets.token_urlsafe(48))' "
        "(or leave it unset to use a generated key kept in the data directory)"
    )
    if squashed in PLACEHOLDER_KEYS or squashed.startswith(("changeme", "replaceme", "yoursecret")):
        raise InsecureSecretKey(f"TRIALHOUSE_SECRET_KEY is a placeholder value; {hint}.")
    if len(key.encode("utf-8")) < MIN_SECRET_KEY_BYTES:
        raise InsecureSecretKey(
            f"TRIALHOUSE_SECRET_KEY has {len(key.encode('utf-8'))} bytes; "
            f"it needs at least {MIN_SECRET_KEY_BYTES}: {hint}."
        )


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="TRIALHOUSE_", extra="ignore")

    data_dir: Path = Path("./var")
    database_url: str | None = None
    secret_key: str | None = None

    # Device ingest limits (inclusive).
    max_clip_bytes: int = 8 * 1024 * 1024
    min_clip_s: float = 0.5
    max_clip_s: float = 60.0
    min_rate_hz: int = 8000
    max_rate_hz: int = 48000
    # Heartbeats: the interval the server asks for, and the gap (a multiple of it) that still
    # extends an open listening segment.
    heartbeat_interval_s: int = 60
    heartbeat_gap_factor: float = 3.0
    heartbeat_jitter: float = 0.1
    clock_skew_flag_s: float = 300.0
    # Times sent by devices must lie in this window around the server's clock.
    max_past_days: int = 400
    max_future_hours: int = 24
    # Device calls whose database and file work runs at once; the others wait their turn.
    device_work_slots: int = Field(default=4, ge=1, le=64)

    # Review
    claim_minutes: float = 5.0

    # Cookies: Secure only behind TLS.
    secure_cookies: bool = False
    # Staff sessions live in the database (auth/sessions.py). One ends at sign-out, on a password,
    # role or active change, after session_idle_s without a request, or session_max_age_s after
    # sign-in. Activity is written at most once per session_touch_s, so the idle limit is exact to
    # within that much.
    session_idle_s: int = Field(default=30 * 60, ge=60)
    session_max_age_s: int = Field(default=12 * 3600, ge=60)
    session_touch_s: int = Field(default=60, ge=1)
    # Personal API tokens: lifetime offered by default and the longest one can be given.
    api_token_days: int = Field(default=90, ge=1)
    api_token_max_days: int = Field(default=365, ge=1)
    # Sign-in throttling (auth/throttle.py): after this many failures within the window, an account
    # or a client address is blocked for sign_in_block_s, doubling with each further failure up to
    # sign_in_block_max_s. Addresses get a higher limit: several staff may share one office address.
    sign_in_account_limit: int = Field(default=5, ge=1)
    sign_in_address_limit: int = Field(default=20, ge=1)
    sign_in_window_s: int = Field(default=15 * 60, ge=1)
    sign_in_block_s: int = Field(default=30, ge=1)
    sign_in_block_max_s: int = Field(default=15 * 60, ge=1)
    # Argon2 verifications run at once per process; the others wait (at most password_wait_s,
    # then 429), so a sign-in flood cannot take the CPU from device calls.
    password_check_slots: int = Field(default=1, ge=1, le=16)
    password_wait_s: float = Field(default=10.0, gt=0)

    default_trial_code: str = "PILOT-1"
    default_sound_classes: list[str] = Field(
        default_factory=lambda: ["smoke_alarm", "baby_cry", "glass_break"]
    )

    # Request bodies other than device clips (which have max_clip_bytes) and register imports.
    max_body_bytes: int = Field(default=1024 * 1024, ge=1024)
    # GET /api/v1/health fails when the data directory's filesystem has less free space than this.
    min_free_bytes: int = Field(default=256 * 1024 * 1024, ge=0)

    @field_validator("data_dir", mode="before")
    @classmethod
    def _expand(cls, v: object) -> object:
        return Path(os.path.expanduser(str(v))) if v is not None else v

    @property
    def clip_dir(self) -> Path:
        return self.data_dir / "clips"

    @property
    def cache_dir(self) -> Path:
        return self.data_dir / "cache"

    @property
    def is_default_sqlite(self) -> bool:
        return self.database_url is None

    def resolved_database_url(self) -> str:
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'trialhouse.db').resolve()}"

    def resolved_secret_key(self) -> str:
        """The configured key, or one generated once and kept (mode 0600) in the data directory.

        A configured key that is a known placeholder or shorter than 32 bytes is refused
        (``InsecureSecretKey``): anyone who knows it could forge erasure tickets and signed cookies.
        """
        if self.secret_key:  # empty counts as unset
            check_secret_key(self.secret_key)
            return self.secret_key
        self.data_dir.mkdir(parents=True, exist_ok=True)
        path = self.data_dir / "secret_key"
        if not path.exists():
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            with os.fdopen(fd, "w") as fh:
                fh.write(secrets.token_urlsafe(48))
        return path.read_text().strip()
