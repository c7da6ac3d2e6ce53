"""One settings class, read from ``SEGSCORE_*`` environment variables and checked at start-up."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Annotated, Literal

from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

# The scopes an API key can carry; "admin" implies every scope, including those of routes added later.
SCOPES = ("read", "fit", "assign", "drift", "admin")


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="SEGSCORE_", frozen=True)

    # Where versions are kept. "local": a SQLite index and the artifacts under store_dir (one machine).
    # "postgres": the index in PostgreSQL at database_url, the artifacts under store_dir, a directory (or volume)
    # shared by every replica. See README, "Deployment".
    store_backend: Literal["local", "postgres"] = "local"
    store_dir: Path = Path("models_store")
    database_url: str | None = None
    # Connections the postgres backend keeps open per process, and how long a request waits for the database
    # (a connection, or an answer) before it is refused with 503.
    database_pool_size: int = Field(4, ge=1, le=100)
    database_timeout_seconds: float = Field(5.0, gt=0)
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)
    # Server processes (uvicorn workers) behind the one port. Each pins its BLAS/OpenMP pool to one thread and
    # loads the live versions at start-up; with more than one, /metrics adds up the workers' counts
    # (prometheus_client's multiprocess mode, in a fresh directory per server start). See README, "Workers".
    workers: int = Field(1, ge=1, le=64)

    # API keys live in the store (``segscore keys create``); there is no key setting.

    # Slow clients (service/connections.py, service/middleware.py). A kept-alive connection idle this long is
    # closed (uvicorn's timeout_keep_alive).
    keep_alive_seconds: int = Field(5, ge=1, le=300)
    # A request line and headers not complete this long after the connection opened or the request began:
    # the connection is closed. So is a head larger than max_header_bytes.
    header_read_timeout_seconds: float = Field(10.0, gt=0)
    max_header_bytes: int = Field(64 * 1024, ge=4096)
    # A request body that sends nothing for this long is answered 408 and the connection is closed.
    body_read_timeout_seconds: float = Field(30.0, gt=0)

    # Data protection: stored drift reports older than this many days are deleted at start-up and then every
    # hour; 0 keeps them forever.
    drift_retention_days: int = Field(0, ge=0)

    # /docs, /redoc and /openapi.json (turn off where the API description should not be public).
    docs_enabled: bool = True

    max_body_bytes: int = Field(256 * 1024 * 1024, ge=1024)
    max_fit_rows: int = Field(1_000_000, ge=2)
    # Big inputs (README, "Big inputs"). CSV, gzip CSV and Parquet fit uploads are spooled to a temporary file
    # in upload_dir (the system's temporary directory when unset) and read in blocks. A fit with engine "auto"
    # runs in memory up to out_of_core_rows training rows and out of core above; an out-of-core fit may hold up
    # to max_out_of_core_rows rows (it keeps a few numbers per row, ~250 bytes: 1.2 GB at 5 million rows). A
    # compressed upload may expand to at most max_decompressed_bytes.
    out_of_core_rows: int = Field(500_000, ge=1)
    max_out_of_core_rows: int = Field(5_000_000, ge=2)
    max_decompressed_bytes: int = Field(16 * 1024 ** 3, ge=1024)
    upload_dir: Path | None = None
    max_assign_rows: int = Field(100_000, ge=1)
    max_drift_rows: int = Field(1_000_000, ge=1)
    # Agglomerative clustering needs O(n^2) memory; above this many rows it is refused.
    max_agglomerative_rows: int = Field(20_000, ge=2)
    max_k_candidates: int = Field(30, ge=1)   # size of a k range searched in one fit
    max_k: int = Field(100, ge=2)             # largest k (or top of a k range) a fit may ask for
    max_features: int = Field(1_000, ge=1)    # most feature columns in one fit
    # Bodies larger than this are parsed in a worker thread (never on the event loop), and at most
    # large_body_concurrency such requests are read and parsed at once (the others wait).
    large_body_bytes: int = Field(1024 * 1024, ge=1024)
    large_body_concurrency: int = Field(2, ge=1)
    silhouette_sample: int = Field(10_000, ge=100)
    reference_sample: int = Field(5_000, ge=100)
    bundle_cache_size: int = Field(16, ge=1)
    chart_cache_size: int = Field(64, ge=1)     # rendered chart PNGs kept in memory (each ~50-150 KB)
    # Batches up to this size are assigned on the event loop; larger ones in a worker thread.
    inline_assign_rows: int = Field(2_000, ge=1)
    fit_concurrency: int = Field(1, ge=1)     # fits running at once, each in its own worker process
    # A fit still running after this many seconds is stopped (its worker killed, nothing written; 504).
    fit_time_limit_seconds: float = Field(1800.0, gt=0)
    # A server refreshes its background jobs' heartbeat every third of this; a queued or running job whose
    # heartbeat is older (its server was killed or restarted) is marked failed by any server of the store.
    job_lease_seconds: float = Field(30.0, gt=0)

    # Fits on a Dask cluster (service/engines/dask_engine.py; README "Fitting on a Dask cluster").
    # The scheduler's address, e.g. tcp://host:8786; unset: no Dask engine.
    dask_scheduler: str | None = None
    # engine "auto" picks the Dask engine above this many training rows, when a scheduler is set.
    dask_auto_rows: int = Field(5_000_000, ge=2)
    # Where uploaded records are spilled as Parquet before a Dask fit: storage every worker can read under the
    # same path (default: <store_dir>/dask-spill, right for a cluster on this machine).
    dask_spill_dir: Path | None = None
    # Data locations a fit's ``source`` may name (fsspec URLs or paths, e.g. file:///lake/customers/ or
    # s3://bucket/segments/), comma-separated. Empty (the default): every ``source`` is refused with 403.
    source_prefixes: Annotated[tuple[str, ...], NoDecode] = ()

    drift_min_rows: int = Field(50, ge=2)
    drift_alpha: float = Field(0.01, gt=0, lt=0.5)
    drift_psi_watch: float = Field(0.10, gt=0)
    drift_psi_alert: float = Field(0.25, gt=0)
    # Material effect sizes for the items that have no PSI.
    drift_outlier_rate_ratio: float = Field(2.0, gt=1)
    drift_residual_median_ratio: float = Field(1.5, gt=1)
    # The "watch" analogues of the two ratios above (PSI's is drift_psi_watch); each at most its alert level.
    drift_outlier_rate_watch_ratio: float = Field(1.5, gt=1)
    drift_residual_median_watch_ratio: float = Field(1.2, gt=1)

    # Live drift (service/live/): counts of what assign sees, per version and time bucket, flushed to the store
    # (where replicas' counts add up) every live_flush_seconds; buckets older than live_retention_days are
    # deleted. Prometheus gauges of the live figures over live_metrics_window_seconds are refreshed every
    # live_metrics_seconds. Every replica must use the same live_bucket_seconds.
    live_drift: bool = True
    live_bucket_seconds: int = Field(300, ge=1, le=86_400)
    live_flush_seconds: float = Field(2.0, gt=0, le=300)
    live_retention_days: int = Field(30, ge=1)
    live_metrics_window_seconds: int = Field(3600, ge=1)
    live_metrics_seconds: float = Field(10.0, gt=0)

    # Cyclic-GC generation-0 threshold set at start-up (Python's default is 700); 0 leaves the GC alone.
    gc_gen0_threshold: int = Field(50_000, ge=0)

    # access_log: one line per request (method, route, status, duration_ms, segmentation), never record values.
    access_log: bool = False
    log_level: str = "info"
    log_format: Literal["text", "json"] = "text"    # json: one JSON object a line

    @field_validator("source_prefixes", mode="before")
    @classmethod
    def _comma_separated(cls, value):
        if isinstance(value, str):
            return tuple(part.strip() for part in value.split(",") if part.strip())
        return value

    @model_validator(mode="after")
    def _database_url_for_postgres(self) -> "Settings":
        if self.store_backend == "postgres":
            if not self.database_url:
                raise ValueError("store_backend 'postgres' needs database_url (SEGSCORE_DATABASE_URL or "
                                 "--database-url), a postgresql:// URL")
            if not self.database_url.startswith(("postgresql://", "postgres://")):
                raise ValueError("database_url must be a postgresql:// URL")
        return self

    @model_validator(mode="after")
    def _drift_bands_ordered(self) -> "Settings":
        pairs = (("drift_psi_watch", "drift_psi_alert"),
                 ("drift_outlier_rate_watch_ratio", "drift_outlier_rate_ratio"),
                 ("drift_residual_median_watch_ratio", "drift_residual_median_ratio"))
        for watch, alert in pairs:
            if getattr(self, watch) > getattr(self, alert):
                raise ValueError(f"{watch} ({getattr(self, watch)}) must not exceed {alert} ({getattr(self, alert)})")
        return self


@lru_cache
def get_settings() -> Settings:
    return Settings()
