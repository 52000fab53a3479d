"""Settings, read once from the environment (prefix ``DEMAUDIT_``) and passed down explicitly."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from pydantic_settings import BaseSettings, SettingsConfigDict

from workers.datum import DEFAULT_GRID_DIRS


class Settings(BaseSettings):
    """Deployment settings. Workers never read these: the runner passes what they need."""

    model_config = SettingsConfigDict(env_prefix="DEMAUDIT_")

    scheduler: str | None = None
    """Address of an external Dask scheduler (tcp://host:8786); None starts a local cluster."""
    local_workers: int = 2
    """Worker processes of the embedded local cluster (one thread each)."""
    worker_memory_limit: str = "4GiB"
    grid_dirs: tuple[str, ...] = DEFAULT_GRID_DIRS
    """Folders holding PROJ geoid grids (egm96_15.gtx)."""
    data_roots: tuple[Path, ...] | None = None
    """When set, every path a job spec names must lie inside one of these folders."""
    job_store: Path = Path("demaudit-jobs.sqlite")


@lru_cache
def get_settings() -> Settings:
    """The settings of this process (cached)."""
    return Settings()
