"""Typed settings, read once from TRIALHOUSE_* environment variables.

Nothing here connects to anything; ``create_app(settings)`` and the CLI do that.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


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
    session_max_age_s: int = 12 * 3600

    default_trial_code: str = "PILOT-1"
    default_sound_classes: list[str] = Field(default_factory=lambda: ["smoke_alarm", "baby_cry", "glass_break"])

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
        """The configured key, or one generated once and kept (mode 0600) in the data directory."""
        if self.secret_key:
            return self.secret_key
        self.data_dir.mkdir(parents=True, exist_ok=True)
        path = self.data_dir / "secret_key"
        if not path.exists():
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            with os.fdopen(fd, "w") as fh:
                fh.write(secrets.token_urlsafe(48))
        return path.read_text().strip()
