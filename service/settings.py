"""One settings class, read from ``SEGSCORE_*`` environment variables and checked at start-up."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

SCOPES = ("fit", "read", "assign", "drift")


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="SEGSCORE_", frozen=True)

    store_dir: Path = Path("models_store")
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)

    # API keys: {"<key>": ["fit", "read", ...]}. Empty means authentication is off (local use).
    api_keys: dict[str, list[str]] = Field(default_factory=dict)

    max_body_bytes: int = Field(256 * 1024 * 1024, ge=1024)
    max_fit_rows: int = Field(1_000_000, ge=2)
    max_assign_rows: int = Field(100_000, ge=1)
    max_drift_rows: int = Field(1_000_000, ge=1)
    # Agglomerative clustering needs O(n^2) memory; above this many rows it is refused.
    max_agglomerative_rows: int = Field(20_000, ge=2)
    max_k_candidates: int = Field(30, ge=1)   # size of a k range searched in one fit
    silhouette_sample: int = Field(10_000, ge=100)
    reference_sample: int = Field(5_000, ge=100)
    bundle_cache_size: int = Field(16, ge=1)
    chart_cache_size: int = Field(64, ge=1)     # rendered chart PNGs kept in memory (each ~50-150 KB)
    # Batches up to this size are assigned on the event loop; larger ones in a worker thread.
    inline_assign_rows: int = Field(2_000, ge=1)
    fit_concurrency: int = Field(1, ge=1)

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

    # Cyclic-GC generation-0 threshold set at start-up (Python's default is 700); 0 leaves the GC alone.
    gc_gen0_threshold: int = Field(50_000, ge=0)

    access_log: bool = False
    log_level: str = "info"

    @field_validator("api_keys")
    @classmethod
    def _known_scopes(cls, value: dict[str, list[str]]) -> dict[str, list[str]]:
        for key, scopes in value.items():
            if len(key) < 16:
                raise ValueError("every API key must be at least 16 characters long")
            unknown = sorted(set(scopes) - set(SCOPES))
            if unknown:
                raise ValueError(f"unknown scope(s) {unknown}; allowed: {list(SCOPES)}")
        return value

    @model_validator(mode="after")
    def _drift_bands_ordered(self) -> "Settings":
        pairs = (("drift_psi_watch", "drift_psi_alert"),
                 ("drift_outlier_rate_watch_ratio", "drift_outlier_rate_ratio"),
                 ("drift_residual_median_watch_ratio", "drift_residual_median_ratio"))
        for watch, alert in pairs:
            if getattr(self, watch) > getattr(self, alert):
                raise ValueError(f"{watch} ({getattr(self, watch)}) must not exceed {alert} ({getattr(self, alert)})")
        return self

    @property
    def auth_enabled(self) -> bool:
        return bool(self.api_keys)


@lru_cache
def get_settings() -> Settings:
    return Settings()
