"""The one settings object. Every setting comes from here (environment prefix ``PHASEWARD_``)."""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

LOOPBACK_HOSTS = frozenset({"127.0.0.1", "::1", "localhost"})


class Settings(BaseSettings):
    """Service settings; tests build one directly instead of touching the environment."""

    model_config = SettingsConfigDict(env_prefix="PHASEWARD_", extra="forbid")

    data_dir: Path = Path("phaseward-data")
    database_url: str = ""  # empty: a SQLite file inside data_dir
    host: str = "127.0.0.1"
    port: int = Field(default=8470, ge=1, le=65535)
    log_level: Literal["debug", "info", "warning", "error"] = "info"
    # "keys": every request needs an access key of the right role. "open": no keys, for local
    # development only, so the service then refuses to bind anything but loopback.
    auth_mode: Literal["keys", "open"] = "keys"
    rate_per_s: float = Field(default=200.0, gt=0)  # requests per second per key, sustained
    rate_burst: int = Field(default=400, ge=1)
    # Requests with a missing or unknown key, per client address: one every 5 s sustained.
    auth_failure_rate_per_s: float = Field(default=0.2, gt=0)
    auth_failure_burst: int = Field(default=20, ge=1)

    # SQLite durability: FULL survives power loss, NORMAL survives process crashes only.
    sqlite_synchronous: Literal["FULL", "NORMAL"] = "FULL"
    sqlite_busy_timeout_ms: int = Field(default=10_000, ge=0)

    max_body_bytes: int = Field(default=4 * 1024 * 1024, ge=1024)
    max_batch_samples: int = Field(default=2000, ge=1)
    max_page_size: int = Field(default=1000, ge=1)
    # Threads of the BLAS library numpy uses. The service's matrices are small and requests
    # run side by side, so one thread each beats several threads spinning for a core.
    blas_threads: int = Field(default=1, ge=1, le=64)
    # Retention: raw samples older than this are reduced to per-interval min/max/mean.
    retain_raw_s: float | None = Field(default=None, gt=0, description="None: keep all")
    summary_interval_s: float = Field(default=60.0, gt=0)
    retention_every_s: float = Field(default=3600.0, gt=0)
    # PostgreSQL: samples are partitioned by time, one partition per this many days; the
    # partitions of the current and this many upcoming periods are kept made ahead.
    partition_days: int = Field(default=1, ge=1, le=366)
    partitions_ahead: int = Field(default=3, ge=1, le=366)
    max_trace_bytes: int = Field(default=64 * 1024 * 1024, ge=1024)
    max_trace_samples: int = Field(default=500_000, ge=2)
    # Clock policy: a sample dated more than this ahead of the service's clock is refused
    # (422 naming its time). One wrong clock would otherwise freeze the rail's live state,
    # since every later sample would count as late.
    future_skew_s: float = Field(default=60.0, ge=0, le=1e9)
    # A background job's lease: renewed every third of this while its server lives; after it
    # expires another server takes the job over.
    job_lease_s: float = Field(default=30.0, ge=0.3)
    # Fault captures: bytes as uploaded (and unpacked, for .npz), samples per channel.
    max_capture_bytes: int = Field(default=64 * 1024 * 1024, ge=1024)
    max_capture_samples: int = Field(default=2_000_000, ge=4)

    # Where the monitor assesses a rail (capacity, N-1 screening, forecast) between changes of
    # its phase conditions: at least once per grid cell of absolute time, and whenever what a
    # verdict rests on moved beyond a tolerance since the last assessment (README, "Fleet").
    assess_grid_s: float = Field(default=10.0, gt=0, le=3600)
    assess_load_tolerance: float = Field(default=0.02, gt=0, le=0.2)  # of total rated current
    assess_temp_tolerance_k: float = Field(default=1.0, gt=0, le=20)
    assess_vout_tolerance: float = Field(default=0.02, gt=0, le=0.2)  # of nominal output
    assess_weight_tolerance: float = Field(default=0.02, gt=0, le=0.5)  # 1.0 = an equal share
    # Rails whose model (thermal network, arrays) and live state a process keeps in memory:
    # the fleet's size.
    rail_cache_size: int = Field(default=4096, ge=16)
    # The whole live state (the estimator's covariance included) is checkpointed every this
    # many judged samples of a rail; between checkpoints the state row is written without it.
    state_checkpoint_samples: int = Field(default=60, ge=1, le=10_000)
    # Routine samples (every phase active and reported within its limits, no flag, the rail
    # nominal) may wait up to this long to be judged in one monitor pass with the rail's next
    # ones: a fleet of rails posting single samples then costs one pass per rail per interval
    # instead of one per sample. 0: every sample is judged before its request is answered.
    judge_within_s: float = Field(default=0.0, ge=0, le=60)
    # The monitor passes run in a helper process of their own: a server's requests and its
    # passes then use two cores, not one interpreter's turns (for fleets).
    judge_apart: bool = False

    @model_validator(mode="after")
    def _default_database(self) -> Settings:
        if not self.database_url:
            self.database_url = f"sqlite:///{(self.data_dir / 'phaseward.db').as_posix()}"
        if self.auth_mode == "open" and self.host not in LOOPBACK_HOSTS:
            raise ValueError(
                f"auth_mode 'open' serves without keys, so it binds loopback only, not "
                f"{self.host}: serve with keys (PHASEWARD_AUTH_MODE=keys) or on 127.0.0.1"
            )
        return self

    @property
    def is_sqlite(self) -> bool:
        return self.database_url.startswith("sqlite")

    @property
    def partition_s(self) -> float:
        return self.partition_days * 86400.0
