"""The fit report: one builder for every engine (``service.core.fit``, ``service.engines.out_of_core``,
``service.engines.dask_engine``), so a version's report has the same keys, computed the same way, whichever
engine fitted it. Only the values an engine measures are passed in; what follows from them (the k curve's
knee, the distortion, the feature names, the request echo, the library versions) is derived here.
"""

from __future__ import annotations

import platform
import warnings as python_warnings
from typing import Any

import joblib
import numpy as np
import pandas as pd
import scipy
import sklearn
from kneed import KneeLocator

from service.core.bundle import FitConfig, ReferenceProfile


def kneedle_k(ks: list[int], distortions: list[float]) -> int | None:
    """Kneedle knee of a decreasing convex curve (Satopaa et al., 2011); None when it finds none."""
    if len(ks) < 3 or np.ptp(np.asarray(distortions, dtype=float)) == 0:
        return None
    # The knee is reported for comparison only: the library's warnings (no knee found) must not fail a fit.
    with python_warnings.catch_warnings(), np.errstate(all="ignore"):
        python_warnings.simplefilter("ignore")
        knee = KneeLocator(ks, distortions, curve="convex", direction="decreasing").knee
    return None if knee is None else int(knee)


def library_versions() -> dict[str, str]:
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-learn": sklearn.__version__,
        "pandas": pd.__version__,
        "joblib": joblib.__version__,
    }


def fit_report(config: FitConfig, *, n_records: int, pca: Any, imputer: Any, curve: list[dict[str, Any]],
               chosen: int, method: str, inertia: float, segments: list[dict[str, Any]], centroid_agreement: float,
               residual_threshold: float, residual_limit: float, reference: ReferenceProfile,
               calibration: dict[str, Any], data_sha256: str, warnings: list[dict[str, Any]], engine: str,
               engine_details: dict[str, Any] | None = None) -> dict[str, Any]:
    """The report of a fitted bundle (docs/API.md "Fit report").

    ``curve``: one row per k tried ({k, distortion, inertia, silhouette}); ``inertia``: the chosen k's sum of
    squared distances to the own centroid; ``calibration``: the calibration's report; ``engine_details``: None
    except for an engine with something to say (the Dask engine's cluster)."""
    features = list(config.features)
    silhouette = next(row["silhouette"] for row in curve if row["k"] == chosen)
    return {
        "n_records": n_records,
        "features": features,
        "id_column": config.id_column,
        "config": config.as_request(),
        "components": None if pca is None else int(pca.n_components_),
        "explained_variance_ratio": [] if pca is None else [float(v) for v in pca.explained_variance_ratio_],
        "k": chosen,
        "selection": {"method": method, "chosen": chosen,
                      "kneedle_k": kneedle_k([row["k"] for row in curve], [row["distortion"] for row in curve]),
                      "curve": curve},
        "distortion": inertia / n_records,
        "inertia": inertia,
        "segments": segments,
        "quality": {"inertia": inertia, "distortion": inertia / n_records, "silhouette": silhouette,
                    "centroid_agreement": centroid_agreement},
        "residual_threshold": residual_threshold,
        "residual_limit_jm": residual_limit,
        "training_outlier_rate": reference.outlier_rate,
        "calibration": calibration,
        "imputation_medians": dict(zip(features, (float(v) for v in imputer.statistics_))),
        "data_sha256": data_sha256,
        "library_versions": library_versions(),
        "warnings": warnings,
        "engine": engine,
        "engine_details": engine_details,
    }
