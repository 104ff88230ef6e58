"""All service and worker configuration, read once from ATOMQ_* environment variables."""

from __future__ import annotations

import os
from functools import lru_cache
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


def default_data_dir() -> Path:
    base = Path(os.environ.get("XDG_DATA_HOME", Path.home() / ".local" / "share"))
    return base / "atomq"


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="ATOMQ_")

    data_dir: Path = Field(default_factory=default_data_dir)
    database_url: str | None = Field(
        default=None, description="SQLAlchemy URL; default is a SQLite file in data_dir."
    )
    broker_url: str | None = Field(
        default=None, description="Celery broker, e.g. redis://host:6379/0."
    )
    max_atoms: int = Field(default=100_000, description="Largest structure accepted.")
    max_steps: int = Field(default=1_000_000, description="Most steps one job may ask for.")
    min_distance: float = Field(
        default=0.5, description="Two atoms closer than this (Angstrom) are refused."
    )
    progress_interval_s: float = Field(
        default=1.0, description="Workers write progress at most this often."
    )
    max_wall_time_s: float = Field(
        default=7 * 24 * 3600.0, description="Wall-time limit of a job; users may ask for less."
    )
    max_attempts: int = Field(
        default=3, ge=1, description="A job whose worker died this often ends failed."
    )
    lease_s: float = Field(
        default=60.0,
        description="A running job's lease; its worker renews it every lease_s / 4. A job "
        "whose lease expired is taken over by the next delivery.",
    )

    reconcile_interval_s: float = Field(
        default=5.0,
        description="How often the API re-sends lost messages (0 turns the reconciler off).",
    )
    dispatch_grace_s: float = Field(
        default=10.0, description="A queued job with no accepted message after this is re-sent."
    )
    redispatch_after_s: float = Field(
        default=120.0,
        description="A job still queued this long after its message was sent gets another "
        "(a message can be stranded in a dead worker's unacknowledged set); duplicates are "
        "harmless.",
    )
    model_cache_mb: int = Field(
        default=8192,
        ge=0,
        description="Memory each worker process may fill with loaded calculator versions; "
        "beyond it the least recently used are dropped (one ML model takes 0.5-5 GB).",
    )
    worker_heartbeat_s: float = Field(
        default=10.0,
        gt=0,
        description="How often a worker renews its record; one unseen for three heartbeats "
        "counts as gone.",
    )
    max_body_bytes: int = Field(default=64 * 1024 * 1024, description="Largest request body.")
    max_queued_per_user: int = Field(
        default=20_000, description="Queued plus running jobs one user may have at once."
    )
    requests_per_minute: int = Field(
        default=6000, description="Per token and API process; 0 turns the limit off."
    )

    @property
    def resolved_database_url(self) -> str:
        if self.database_url:
            return self.database_url
        return f"sqlite:///{self.data_dir / 'atomq.db'}"

    artifact_store: Path | None = Field(
        default=None,
        description="Where workers write trajectories; default data_dir/artifacts. Workers "
        "on other machines need it on a shared filesystem at the same path.",
    )

    @property
    def artifacts_dir(self) -> Path:
        return self.artifact_store or self.data_dir / "artifacts"


def hide_password(url: str) -> str:
    """A URL fit for logs and screens: any password replaced by ***."""
    parts = urlsplit(url)
    if parts.password is None:
        return url
    netloc = parts.netloc.replace(f":{parts.password}@", ":***@")
    return urlunsplit(parts._replace(netloc=netloc))


@lru_cache
def get_settings() -> Settings:
    return Settings()
