from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from schemas.common import DATA_SHA256

Record = dict[str, Any]

# The fit engines, in one place (service/engines maps each to its function): how the bundle is fitted, never
# what a version holds. "auto" picks memory up to the out_of_core_rows setting and out_of_core above.
FIT_ENGINES = ("memory", "out_of_core", "dask")
AUTO_ENGINE = "auto"
EngineChoice = Literal[(AUTO_ENGINE, *FIT_ENGINES)]  # type: ignore[valid-type]


class KRange(BaseModel):
    model_config = ConfigDict(extra="forbid")
    min: int = Field(2, ge=1)
    max: int = Field(10, ge=1)

    @model_validator(mode="after")
    def _ordered(self) -> "KRange":
        if self.min > self.max:
            raise ValueError(f"min ({self.min}) must not exceed max ({self.max})")
        return self


class FitRequest(BaseModel):
    """Fit a new version. Only ``records`` is required."""

    model_config = ConfigDict(extra="forbid")
    records: list[Record] = Field(default_factory=list, description="one JSON object per customer")
    features: list[str] | None = Field(None, min_length=1, description="null: every numeric column except id_column")
    id_column: str | None = None
    scaling: Literal["standard", "robust", "minmax", "none"] = "standard"
    components: int | float | None = Field(
        0.9, description="int: count; float in (0,1): variance share to keep; null: no PCA")
    method: Literal["kmeans", "agglomerative"] = "kmeans"
    linkage: Literal["complete", "average", "single", "ward"] = "complete"
    k: int | KRange = Field(default_factory=KRange, description="an int, or a range to search")
    selection: Literal["elbow", "silhouette"] = "elbow"
    n_init: int = Field(10, ge=1, le=100)
    seed: int = Field(0, ge=0, le=2**32 - 1)
    outlier_quantile: float = Field(0.99, ge=0.5, lt=1.0)
    make_live: bool | None = None
    engine: EngineChoice = Field(AUTO_ENGINE, description=(  # type: ignore[valid-type]
        "memory: the whole matrix in memory (exact); out_of_core: streaming passes over the upload (big inputs; "
        "k-means only); dask: on the cluster at SEGSCORE_DASK_SCHEDULER; auto: dask for a source or above "
        "SEGSCORE_DASK_AUTO_ROWS rows when a scheduler is set, else memory up to the out_of_core_rows setting "
        "and out_of_core above"))
    source: str | None = Field(None, min_length=1, max_length=2048, description=(
        "instead of records: a Parquet dataset or CSV files (path or fsspec URL) that the Dask workers read; only "
        "under SEGSCORE_SOURCE_PREFIXES (403 otherwise)"))

    @field_validator("components", "k", mode="before")
    @classmethod
    def _not_a_boolean(cls, value: Any) -> Any:
        # JSON true/false would otherwise pass as 1/0 (one component, k = 1) without a word.
        if isinstance(value, bool):
            raise ValueError("expected a number, got a boolean")
        return value


class CurvePoint(BaseModel):
    k: int
    distortion: float
    inertia: float
    silhouette: float | None


class Selection(BaseModel):
    method: Literal["fixed", "elbow", "silhouette"]
    chosen: int
    kneedle_k: int | None = Field(None, description="Kneedle knee of the distortion curve, for comparison")
    curve: list[CurvePoint]


class FeatureProfile(BaseModel):
    mean: float | None
    median: float | None
    std: float | None
    z: float | None = Field(description="segment mean minus overall mean, in overall standard deviations")


class Segment(BaseModel):
    id: int
    label: str | None
    size: int
    share: float
    distance_threshold: float
    centroid: dict[str, float]
    profile: dict[str, FeatureProfile]
    clusterer_size: int | None = Field(None, description="the clusterer's own count (size counts the assign rule)")
    residual_threshold: float | None = Field(None, description="the segment's residual limit (0 without one)")
    threshold_source: Literal["own", "pooled"] | None = Field(
        None, description="own held-out scores, or the pooled multiplier for a segment with few rows")
    held_out_flag_rate: float | None = Field(None, description="share of its held-out training rows flagged")


class Quality(BaseModel):
    inertia: float
    distortion: float
    silhouette: float | None
    centroid_agreement: float


class FitWarning(BaseModel):
    kind: Literal["dropped_feature", "fewer_clusters", "empty_segment", "tiny_segment", "k_at_range_edge"]
    field: str | None = Field(description="the feature, 'k', or 'segments.<id>' the warning is about")
    message: str


class FitReport(BaseModel):
    name: str
    version: int
    created_at: str
    live: bool
    n_records: int
    features: list[str]
    id_column: str | None
    config: dict[str, Any]
    components: int | None
    explained_variance_ratio: list[float]
    k: int
    selection: Selection
    distortion: float
    inertia: float
    segments: list[Segment]
    quality: Quality
    residual_threshold: float
    residual_limit_jm: float
    training_outlier_rate: float
    calibration: dict[str, Any] | None = Field(None, description="how the outlier thresholds were calibrated")
    imputation_medians: dict[str, float]
    data_sha256: str = Field(description=DATA_SHA256)
    bundle_sha256: str
    library_versions: dict[str, str]
    engine: str | None = Field(None, description="the fit engine that ran (memory, out_of_core, dask); None before "
                               "engines")
    engine_details: dict[str, Any] | None = Field(None, description="the Dask engine: workers, partitions, methods")
    warnings: list[FitWarning] = Field(default_factory=list, description=(
        "what the caller should know about a valid fit: default features dropped (all missing or constant), "
        "empty or tiny segments, fewer distinct clusters than k, k at the edge of the searched range; [] if none"))


class LiveUpdate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    version: int = Field(ge=1, le=2**31 - 1, strict=True)


class LabelUpdate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    label: str | None = Field(max_length=200)
