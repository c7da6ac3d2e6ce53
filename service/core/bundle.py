"""The fitted bundle: what one immutable version holds.

A ``Bundle`` keeps the fitted scikit-learn steps (so results can always be checked against them),
the centroids in the clustering space, the outlier thresholds, the training reference profile that
drift compares against, and the fit report. ``compile_bundle`` in ``service.core.assign`` turns it
into plain numpy arrays for the hot path.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.decomposition import PCA
from sklearn.impute import SimpleImputer


@dataclass(frozen=True)
class FitConfig:
    """Everything a fit needs besides the data; mirrors the fit request with defaults filled in."""

    features: list[str]
    id_column: str | None = None
    scaling: str = "standard"            # standard | robust | minmax | none
    components: int | float | None = 0.9  # count, variance share in (0, 1), or None (no PCA)
    method: str = "kmeans"               # kmeans | agglomerative
    linkage: str = "complete"            # agglomerative only
    k_min: int = 2
    k_max: int = 10
    k_fixed: bool = False                # k given as one int: no search
    selection: str = "elbow"             # elbow | silhouette
    n_init: int = 10
    seed: int = 0
    outlier_quantile: float = 0.99
    silhouette_sample: int = 10_000
    reference_sample: int = 5_000
    make_live: bool | None = None         # echoed in the report's config (the store decides what it means)
    # Default-feature columns left out before the fit, with the reason: ((name, why), ...); in ``warnings``.
    dropped_features: tuple[tuple[str, str], ...] = ()
    engine: str = "auto"                  # the engine asked for (schemas.fit.FIT_ENGINES or "auto"); echoed

    def as_request(self) -> dict[str, Any]:
        """The request as the report echoes it (``config``)."""
        return {
            "features": list(self.features),
            "id_column": self.id_column,
            "scaling": self.scaling,
            "components": self.components,
            "method": self.method,
            "linkage": self.linkage,
            "k": self.k_min if self.k_fixed else {"min": self.k_min, "max": self.k_max},
            "selection": self.selection,
            "n_init": self.n_init,
            "seed": self.seed,
            "outlier_quantile": self.outlier_quantile,
            "make_live": self.make_live,
            "engine": self.engine,
        }


@dataclass(frozen=True)
class ReferenceProfile:
    """Training distribution summary kept for drift checks (raw, original units).

    Every field is a plain type (numpy arrays, numbers, strings, lists of them). Segment counts, the outlier
    baseline and the residual sample come from the same assignment of the training rows as the fit report's
    sizes and the thresholds: the assign rule (nearest centroid of the fitted model). The outlier baseline
    and the residual sample are HELD-OUT figures (each row scored by a cross-fitted model that did not see
    it), because in-sample scores are biased low (see ``service.core.calibration``).
    """

    n_records: int
    bin_kinds: list[str]                 # per feature: "categories" (<= 20 distinct values) or "quantiles"
    bin_edges: list[np.ndarray]          # quantiles: inner decile edges (bins (e[i-1], e[i]]); categories: values
    bin_counts: list[np.ndarray]         # per feature: observed counts per bin (categories: + "other", last)
    means: np.ndarray                    # (n_features,) of observed values
    stds: np.ndarray                     # population std of observed values
    missing_share: np.ndarray            # (n_features,)
    missing_count: np.ndarray            # (n_features,) int
    sample: np.ndarray                   # (<= reference_sample, n_features), raw, NaN = missing
    segment_counts: np.ndarray           # (k,) int: training rows per segment by the assign rule
    outlier_count: int                   # held-out training rows the assign rule's thresholds flag
    outlier_rate: float                  # outlier_count / n_records
    residual_sample: np.ndarray          # (<= reference_sample,) held-out PCA residuals
    residual_median: float               # median of all held-out residuals

    @property
    def segment_shares(self) -> np.ndarray:
        return self.segment_counts / max(int(self.segment_counts.sum()), 1)


@dataclass(frozen=True)
class Bundle:
    features: list[str]
    config: FitConfig
    imputer: SimpleImputer
    scaler: Any | None                   # StandardScaler | RobustScaler | MinMaxScaler | None
    pca: PCA | None
    clusterer: Any                       # KMeans | AgglomerativeClustering (fitted)
    centroids: np.ndarray                # (k, n_dims) in the clustering space
    distance_thresholds: np.ndarray      # (k,) per segment, held-out calibrated
    residual_thresholds: np.ndarray      # (k,) per segment, held-out calibrated (0 without a residual)
    residual_threshold: float            # pooled held-out residual quantile (for comparison; not the flag)
    residual_limit_jm: float
    reference: ReferenceProfile
    report: dict[str, Any]               # fit report, without identity fields (name, version, ...)

    @property
    def k(self) -> int:
        return int(self.centroids.shape[0])

    def scaled(self, values: np.ndarray) -> np.ndarray:
        """Raw values (NaN = missing) -> imputed and scaled matrix, with the fitted steps."""
        imputed = self.imputer.transform(values)
        return imputed if self.scaler is None else self.scaler.transform(imputed)

    def project(self, scaled: np.ndarray) -> np.ndarray:
        """Scaled matrix -> clustering space (PCA scores, or the scaled matrix without PCA)."""
        return scaled if self.pca is None else self.pca.transform(scaled)

    def residuals(self, scaled: np.ndarray) -> np.ndarray:
        """Euclidean distance from each scaled row to its PCA reconstruction (0 without PCA)."""
        if self.pca is None or self.pca.n_components_ == scaled.shape[1]:
            return np.zeros(scaled.shape[0])
        centred = scaled - self.pca.mean_
        scores = centred @ self.pca.components_.T
        return np.linalg.norm(centred - scores @ self.pca.components_, axis=1)
