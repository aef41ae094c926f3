"""Settings: the only module that reads the environment."""

from __future__ import annotations

import os
from functools import lru_cache
from pathlib import Path

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    """Everything a Grovekeeper process needs to know; flags override these values."""

    model_config = SettingsConfigDict(env_prefix="GROVEKEEPER_", extra="ignore")

    home: Path = Field(default=Path("./grovekeeper-data"))
    database_url: str | None = None
    max_upload_mb: int = Field(default=1024, ge=1)
    # Any other request body (a job, a channel change, ...); checked before routing.
    max_request_kb: int = Field(default=1024, ge=1)
    # The table an upload may unpack to in memory (rows x columns x 8 bytes, and a Parquet
    # file's own uncompressed size); default 8 x max_upload_mb. Stops decompression bombs.
    max_table_mb: int | None = Field(default=None, ge=1)
    # Live event streams open at once: per key (no-key mode counts as one key) and in all.
    max_streams_per_key: int = Field(default=20, ge=1)
    max_streams: int = Field(default=200, ge=1)
    # Rows one prediction request may carry; bigger batches belong in several requests.
    max_prediction_rows: int = Field(default=100_000, ge=1)
    # Seconds between flushes of the drift summaries an API process keeps in memory.
    drift_flush_seconds: float = Field(default=5.0, gt=0, le=3600)
    # Rows a batch scoring run reads, predicts and writes at a time (its memory bound).
    scoring_chunk_rows: int = Field(default=50_000, ge=1, le=10_000_000)
    # Seconds without a heartbeat after which a running job is handed back to the queue.
    stale_after_seconds: float = Field(default=60.0, gt=0)
    heartbeat_seconds: float = Field(default=5.0, gt=0)
    # How often an idle worker looks for queued jobs.
    poll_seconds: float = Field(default=1.0, gt=0)
    log_format: str = Field(default="text", pattern="^(text|json)$")
    # Browser origins allowed to call the API (comma-separated); empty keeps CORS closed.
    cors_origins: str = ""
    # Where datasets and model files live: a local folder (default: the home) or any fsspec
    # URL every process can reach (a shared mount, ``s3://bucket/prefix`` with s3fs, ...).
    artifacts: str | None = None
    # Retention (service/housekeeping.py): trials of jobs finished more than this many days
    # ago are deleted (jobs and models stay); unset keeps them for ever. ``serve`` applies
    # it, with the sweep of unreferenced artifact files, every retention_every_hours.
    retain_trials_days: float | None = Field(default=None, gt=0)
    retention_every_hours: float = Field(default=6.0, gt=0)
    # Set by ``serve`` for the workers it starts, so they stop when it is gone.
    parent_pid: int | None = None

    @field_validator("database_url")
    @classmethod
    def _normalise_postgres(cls, value: str | None) -> str | None:
        # SQLAlchemy 2.1 reads postgresql:// as psycopg 3 already; being explicit keeps
        # URLs written for 2.0 (postgres://, postgresql+psycopg2://) working too.
        if value is None:
            return None
        for prefix in ("postgres://", "postgresql://", "postgresql+psycopg2://"):
            if value.startswith(prefix):
                return "postgresql+psycopg://" + value[len(prefix) :]
        return value

    @property
    def db_url(self) -> str:
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.home / 'grovekeeper.db').resolve()}"

    @property
    def artifacts_url(self) -> str:
        return self.artifacts or str(self.home.resolve())

    @property
    def datasets_dir(self) -> Path:
        return self.home / "datasets"

    @property
    def models_dir(self) -> Path:
        return self.home / "models"

    @property
    def tmp_dir(self) -> Path:
        return self.home / "tmp"

    @property
    def table_limit_bytes(self) -> int:
        return (self.max_table_mb or 8 * self.max_upload_mb) * (1 << 20)

    def ensure_dirs(self) -> None:
        """The home and its folders, readable by this user alone (0700).

        The home holds every uploaded table, model and (with SQLite) the key hashes; the
        process umask (``private_files``) keeps what is written inside at 0600.
        """
        private_files()
        for folder in (self.home, self.datasets_dir, self.models_dir, self.tmp_dir):
            folder.mkdir(parents=True, exist_ok=True, mode=0o700)
            if folder.stat().st_uid == os.getuid():
                folder.chmod(0o700)  # a home made by an older version was 0755


def private_files() -> None:
    """Files and folders this process creates are its user's alone (0600 / 0700)."""
    os.umask(0o077)


@lru_cache
def get_settings() -> Settings:
    return Settings()
