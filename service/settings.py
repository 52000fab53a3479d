"""Settings, read once from the environment (prefix ``DEMAUDIT_``) and passed down explicitly.

List-valued settings (``DEMAUDIT_PRINCIPALS``, ``DEMAUDIT_API_TOKENS``, ``DEMAUDIT_DATA_ROOTS``,
``DEMAUDIT_GRID_DIRS``, ``DEMAUDIT_WEBHOOK_ALLOW_NETWORKS``) take either a JSON list or a
comma-separated string. Tokens and principals are checked when the server starts
(``demaudit.service.api.app.check_serving``), so a bad one is a one-line error there, not here.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import json
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

from demaudit.service.run.tile_limit import DEFAULT_TILE_TIMEOUT_S
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS


class Settings(BaseSettings):
    """Deployment settings. Workers never read these: the runner passes what they need."""

    model_config = SettingsConfigDict(env_prefix="DEMAUDIT_")

    scheduler: str | None = None
    """Address of an external Dask scheduler (tcp://host:8786); None starts a local cluster."""
    local_workers: int = 2
    """Worker processes of the embedded local cluster (one thread each)."""
    worker_memory_limit: str = "4GiB"
    grid_dirs: Annotated[tuple[str, ...], NoDecode] = DEFAULT_GRID_DIRS
    """Folders holding PROJ geoid grids (egm96_15.gtx)."""
    data_roots: Annotated[tuple[Path, ...] | None, NoDecode] = None
    """When set, every path a job spec names must lie inside one of these folders. The REST
    service resolves relative spec paths against the first root."""
    job_store: Path = Path("demaudit-jobs.sqlite")
    """SQLite file of the REST service's job records."""

    # --- REST service -----------------------------------------------------------------------
    principals: Annotated[tuple[str, ...], NoDecode] = ()
    """Who may call the REST service: ``name:role:sha256hex`` entries (role ``user`` or
    ``admin``; the SHA-256 of the principal's bearer token, as ``demaudit token new`` prints).
    A user sees only its own jobs and schedules; an admin sees all. Without any principal (here,
    in principals_file or api_tokens) the service refuses to start unless ``insecure_local`` is
    set (and then it must bind to a loopback address)."""
    principals_file: Path | None = None
    """A file of ``name:role:sha256hex`` lines (``#`` comments), e.g. a mounted secret."""
    api_tokens: Annotated[tuple[str, ...], NoDecode] = ()
    """Deprecated: plain bearer tokens, each its own principal ``token-<8 hex of its hash>``
    with the user role. Prefer principals."""
    insecure_local: bool = False
    """Serve without authentication (loopback only; ``demaudit serve --insecure-local``)."""
    results_dir: Path = Path("demaudit-results")
    """Folder of the REST service's job outputs: one sub-folder per job id."""
    max_running_jobs: int = Field(default=4, ge=1)
    """Jobs the REST service runs at once; later ones wait (status accepted)."""
    max_body_bytes: int = Field(default=1_048_576, ge=1024)
    """Largest request body the REST service reads (HTTP 413 beyond)."""
    task_retries: int = Field(default=1, ge=0)
    """Retries of a tile task whose worker was lost."""
    job_stall_timeout_s: float | None = Field(default=600.0, gt=0)
    """A job none of whose waiting Dask tasks finished for this long fails ("no tile finished
    for N s; workers: W"), e.g. when every worker is gone; unset (``null``) waits for ever."""
    tile_timeout_s: float | None = Field(default=DEFAULT_TILE_TIMEOUT_S, ge=0, allow_inf_nan=False)
    """A tile task that has run (not waited) this long is cancelled and its tile recorded as
    failed ("tile X did not finish within N s; cancelled"), e.g. GDAL blocked on a hung network
    mount; its worker is restarted (Dask cannot stop a thread). 0 (or ``null``): no limit.
    ``demaudit run --tile-timeout`` overrides it for one run."""
    scheduler_timeout_s: float = Field(default=30.0, gt=0)
    """How long one Dask client waits for the external scheduler (at start-up, after losing
    it); then the REST service makes a new client, every few seconds, until it answers."""
    runner_lease_s: float = Field(default=60.0, gt=0)
    """Life of an API process's lease on its jobs without renewal (renewed every 2 s); once it
    runs out, another API process sharing the job store fails those jobs."""
    token: str | None = None
    """Bearer token that ``demaudit submit`` and ``demaudit status`` send (DEMAUDIT_TOKEN)."""
    public_base_url: str | None = None
    """The API's public base URL (``https://audit.example.org/api``): every link, Location
    header and webhook payload link is built on it, never on a request's Host header. Unset:
    links are relative (``/jobs/<id>``). See ``demaudit.service.api.public_base``."""
    public_url: str | None = None
    """Former name of public_base_url (DEMAUDIT_PUBLIC_URL); either sets both."""

    # --- schedules (nightly re-checks) --------------------------------------------------------
    schedule_tick_s: float = Field(default=15.0, gt=0)
    """Seconds between scheduler ticks: renew the lease, start the runs that are due."""
    schedule_lease_s: float = Field(default=60.0, gt=0)
    """Life of the scheduler lease (seconds of the scheduler's clock) without renewal; another
    API process on the same job store takes over once it runs out."""
    schedule_clock_speed: float = Field(default=1.0, ge=1.0)
    """Testing only: the scheduler's clock runs this many times faster than real time, from
    schedule_clock_anchor on (set both alike in every process sharing a job store)."""
    schedule_clock_anchor: dt.datetime | None = None
    """Testing only: the instant (UTC) where the fast scheduler clock meets real time."""
    webhook_attempts: int = Field(default=5, ge=1, le=20)
    """Tries of one webhook notification (the first included)."""
    webhook_backoff_s: float = Field(default=0.5, ge=0)
    """Wait before the second try; it doubles before each further one."""
    webhook_timeout_s: float = Field(default=10.0, gt=0)
    """Time limit of one webhook request."""
    webhook_allow_networks: Annotated[tuple[str, ...], NoDecode] = ()
    """Networks (CIDR, e.g. 10.20.0.0/16 or 127.0.0.1/32) webhooks may reach although they are
    not public: loopback, private, link-local and the like are refused otherwise."""

    @field_validator(
        "principals",
        "api_tokens",
        "grid_dirs",
        "data_roots",
        "webhook_allow_networks",
        mode="before",
    )
    @classmethod
    def _split_list(cls, value: Any) -> Any:
        """Accept a JSON list or a comma-separated string from the environment."""
        if not isinstance(value, str):
            return value
        text = value.strip()
        if text.startswith("["):
            return json.loads(text)
        return [part.strip() for part in text.split(",") if part.strip()]

    @field_validator("tile_timeout_s")
    @classmethod
    def _no_tile_limit(cls, value: float | None) -> float | None:
        return value or None  # 0: no limit (an environment variable cannot say null)

    @field_validator("public_base_url", "public_url")
    @classmethod
    def _base_url(cls, value: str | None) -> str | None:
        from demaudit.service.api.public_base import check_base_url

        return None if value is None else check_base_url(value)

    @model_validator(mode="after")
    def _one_base_url(self) -> Settings:
        self.public_base_url = self.public_base_url or self.public_url
        self.public_url = self.public_base_url
        return self

    @model_validator(mode="after")
    def _schedule_clock(self) -> Settings:
        anchor = self.schedule_clock_anchor
        if self.schedule_clock_speed != 1.0 and anchor is None:
            raise ValueError("schedule_clock_speed needs schedule_clock_anchor")
        if anchor is not None and anchor.tzinfo is None:
            raise ValueError("schedule_clock_anchor needs a time zone (e.g. +00:00)")
        if self.schedule_lease_s / self.schedule_clock_speed <= self.schedule_tick_s:
            raise ValueError("schedule_lease_s must outlast schedule_tick_s (real seconds)")
        return self

    @field_validator("webhook_allow_networks")
    @classmethod
    def _networks(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for text in value:
            try:
                ipaddress.ip_network(text, strict=False)
            except ValueError:
                raise ValueError(f"not a network (CIDR such as 10.0.0.0/8): {text!r}") from None
        return value

    @property
    def has_principals(self) -> bool:
        """Whether any principal or token is configured (not whether they are valid)."""
        return bool(self.principals or self.principals_file or self.api_tokens)
