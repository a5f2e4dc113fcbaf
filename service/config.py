"""Service settings, read from ``BURSTLENS_*`` environment variables and overridden by CLI flags.

Every limit the service enforces lives here, so an operator can see (and tune) them in one place.
Sizes are in bytes, durations in seconds.
"""
from __future__ import annotations

import ipaddress
from pathlib import Path

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


class ServiceSettings(BaseSettings):
    """Settings of one burstlens service (API, store and workers over one data directory)."""

    model_config = SettingsConfigDict(env_prefix="BURSTLENS_", extra="ignore")

    data_dir: Path = Field(Path("burstlens-data"), description="SQLite store and blob folder.")
    host: str = Field("127.0.0.1", description="Address the API binds to.")
    port: int = Field(8000, ge=0, le=65535)
    workers: int = Field(1, ge=0, description="Local job worker processes started by `serve`.")
    dask: str | None = Field(None, description="Dask scheduler address for candidate evaluations.")
    lease_s: float = Field(30.0, gt=0, description="Job lease; a heartbeat renews it every third.")
    max_attempts: int = Field(3, ge=1, description="Claims of one job before it is failed.")
    poll_s: float = Field(0.5, gt=0, description="Idle worker's wait between claim attempts.")
    max_body_bytes: int = Field(512 * 1024**2, gt=0, description="Largest request body.")
    max_files: int = Field(256, ge=1, description="Files per corpus or transform request.")
    max_windows: int = Field(20_000, ge=1, description="Windows per corpus.")
    max_samples: int = Field(200_000_000, ge=1, description="Samples read per corpus (all traces).")
    max_queued_jobs: int = Field(16, ge=1, description="Queued jobs per tenant.")
    max_transform_values: int = Field(64 * 1024**2, ge=1,
                                      description="Largest transform output (windows×channels×samples).")
    tokens_required: bool = Field(False, description="Require a bearer token even with none stored.")
    worker_niceness: int = Field(10, ge=0, le=19, description="Niceness added to job worker "
                                 "processes, so the API on the same host keeps answering while "
                                 "they compute (0: the same priority).")
    # token guessing (service/guessing.py has the rule)
    auth_failures_allowed: int = Field(10, ge=1, description="Failed authentications per client "
                                       "address in the window before answers become 429.")
    auth_failure_window_s: float = Field(600.0, gt=0, description="Sliding window of counted "
                                         "failures; also the longest Retry-After.")
    auth_clients_tracked: int = Field(10_000, ge=1, description="Client addresses the limiter "
                                      "keeps (oldest dropped past this).")
    auth_slow_answer_s: float = Field(1.0, ge=0, description="Delay before each 429 to a slowed "
                                      "client (at most its Retry-After).")

    @property
    def db_path(self) -> Path:
        return self.data_dir / "burstlens.sqlite3"


def is_loopback(host: str) -> bool:
    """True for addresses that only this machine can reach (127.0.0.0/8, ::1, localhost)."""
    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False
