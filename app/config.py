"""Settings from the environment (EXPERTLOOP_*), one class, served by get_settings()."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Literal

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    """Everything the service reads from its environment."""

    model_config = SettingsConfigDict(env_prefix="EXPERTLOOP_", extra="ignore")

    data_dir: Path = Field(
        default=Path("expertloop-data"),
        description="Folder for the embedded SQLite store, uploads in flight and image blobs.",
    )
    database_url: str | None = Field(
        default=None,
        description="SQLAlchemy URL; by default (empty) SQLite in the data folder "
        "(expertloop.db). PostgreSQL: postgresql+psycopg://user@host/db",
    )
    max_upload_bytes: int = Field(
        default=512 * 1024 * 1024, description="Largest rollout file accepted (413 above)."
    )
    max_unpacked_bytes: int = Field(
        default=4 * 1024**3,
        description="Largest ROS 2 bag folder unpacked from a .zip or .tar upload (413 above).",
    )
    job_mode: Literal["thread", "worker", "off"] = Field(
        default="thread",
        description="'thread': background jobs run inside the server; 'worker': only in "
        "`expertloop worker` processes; 'off': not at all (tests that drive jobs by hand).",
    )
    job_lease_seconds: float = Field(
        default=30.0,
        ge=3.0,
        description="How long a worker holds a job without a heartbeat before another worker may "
        "take it over (heartbeats come every third of it, at most every 5 s).",
    )
    queue_threads: int = Field(
        default=0,
        ge=0,
        description="Threads of a server process that run annotators' queue requests (claim, "
        "renew, skip, submit, progress) at once; 0: 2 on SQLite, 4 on PostgreSQL.",
    )
    log_format: Literal["text", "json"] = Field(
        default="text",
        description="'text': readable lines; 'json': one JSON object per line, for log collectors "
        "(`serve` and `worker`).",
    )
    session_hours: float = Field(default=12.0, description="Browser session lifetime.")
    sign_in_failures_per_name: int = Field(
        default=5,
        ge=1,
        description="Failed sign-ins allowed per user name within the window (429 beyond).",
    )
    sign_in_failures_per_address: int = Field(
        default=20,
        ge=1,
        description="Failed sign-ins allowed per client address within the window (429 beyond).",
    )
    sign_in_window_seconds: float = Field(
        default=900.0, gt=0, description="The window in which failed sign-ins are counted."
    )
    max_image_bytes: int = Field(
        default=4 * 1024 * 1024, ge=1, description="Largest camera image accepted in a rollout."
    )
    max_scene_bytes: int = Field(
        default=64 * 1024, ge=2, description="Largest scene description accepted (JSON text)."
    )
    max_array_bytes: int = Field(
        default=1024 * 1024 * 1024,
        ge=1,
        description="Largest total size the arrays of one .npz upload may expand to.",
    )

    @property
    def resolved_database_url(self) -> str:
        """The database URL, defaulting to SQLite inside the data folder."""
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'expertloop.db').resolve()}"

    @property
    def blob_dir(self) -> Path:
        """Content-addressed folder for images attached to states."""
        return self.data_dir / "blobs"

    @property
    def snapshot_dir(self) -> Path:
        """Where each snapshot version's Parquet export is kept (a cache, rebuilt when missing)."""
        return self.data_dir / "snapshots"

    @property
    def upload_dir(self) -> Path:
        """Where uploads are spooled while they are validated."""
        return self.data_dir / "uploads"


@lru_cache
def get_settings() -> Settings:
    """The process-wide settings, read once from the environment."""
    return Settings()
