"""The assign hot path: a bundle compiled into plain numpy arrays.

Imputer-free scaling followed by PCA is one affine map ``z = x @ A + c``; nearest-centroid search is
one more product with the centroids plus an argmin. No scikit-learn call and no DataFrame run per
request. ``tests/core/test_assign.py`` checks labels and distances against the stored scikit-learn
objects on every supported configuration.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler

from service.core.bundle import Bundle

CHUNK_ROWS = 4096  # keeps the (rows, k) and (rows, d) temporaries in cache


@dataclass(frozen=True)
class CompiledBundle:
    features: tuple[str, ...]
    medians: np.ndarray            # (p,) imputation values
    affine: np.ndarray             # (p, d): x @ affine + offset -> clustering space
    offset: np.ndarray             # (d,)
    scale: np.ndarray              # (p,) elementwise scaling: scaled = x * scale + shift
    shift: np.ndarray              # (p,)
    components: np.ndarray | None  # (d, p) PCA axes, when PCA drops dimensions (for residuals)
    centre_shift: np.ndarray | None  # (p,) shift - PCA mean: centred scaled row = x * scale + centre_shift
    centroids: np.ndarray          # (k, d)
    centroid_sq_norms: np.ndarray  # (k,)
    distance_thresholds: np.ndarray
    residual_threshold: float

    @property
    def k(self) -> int:
        return int(self.centroids.shape[0])


@dataclass(frozen=True)
class Assignment:
    segment: np.ndarray            # (n,) int
    distance: np.ndarray           # (n,) to the nearest centroid
    runner_up: np.ndarray | None   # (n,) int, None when k == 1
    margin: np.ndarray | None      # runner-up distance minus nearest distance
    residual: np.ndarray           # (n,) distance to the PCA reconstruction (0 without PCA)
    far: np.ndarray                # (n,) bool: distance over the segment's threshold
    off_plane: np.ndarray          # (n,) bool: residual over the version's threshold

    @property
    def outlier(self) -> np.ndarray:
        return self.far | self.off_plane


def _elementwise_scaling(scaler, n_features: int) -> tuple[np.ndarray, np.ndarray]:
    """(scale, shift) with scaler.transform(x) == x * scale + shift."""
    if scaler is None:
        return np.ones(n_features), np.zeros(n_features)
    if isinstance(scaler, StandardScaler):
        inv = 1.0 / scaler.scale_
        return inv, -scaler.mean_ * inv
    if isinstance(scaler, RobustScaler):
        inv = 1.0 / scaler.scale_
        return inv, -scaler.center_ * inv
    if isinstance(scaler, MinMaxScaler):
        return scaler.scale_.copy(), scaler.min_.copy()
    raise TypeError(f"no elementwise form for {type(scaler).__name__}")


def compile_bundle(bundle: Bundle) -> CompiledBundle:
    p = len(bundle.features)
    scale, shift = _elementwise_scaling(bundle.scaler, p)
    pca = bundle.pca
    if pca is None:
        affine, offset = np.diag(scale), shift.copy()
        components = centre_shift = None
    else:
        axes = pca.components_                      # (d, p)
        affine = scale[:, None] * axes.T            # (p, d)
        offset = (shift - pca.mean_) @ axes.T
        drops = pca.n_components_ < p
        components = axes.copy() if drops else None
        centre_shift = (shift - pca.mean_) if drops else None
    centroids = np.ascontiguousarray(bundle.centroids)
    return CompiledBundle(
        features=tuple(bundle.features),
        medians=bundle.imputer.statistics_.astype(np.float64).copy(),
        affine=np.ascontiguousarray(affine),
        offset=offset,
        scale=scale,
        shift=shift,
        components=components,
        centre_shift=centre_shift,
        centroids=centroids,
        centroid_sq_norms=np.einsum("ij,ij->i", centroids, centroids),
        distance_thresholds=np.asarray(bundle.distance_thresholds, dtype=np.float64),
        residual_threshold=float(bundle.residual_threshold),
    )


def impute(compiled: CompiledBundle, values: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Fill NaN with the training medians; return the filled matrix and the missing mask (or None)."""
    missing = np.isnan(values)
    if not missing.any():
        return values, None
    filled = np.where(missing, compiled.medians, values)
    return filled, missing


def assign(compiled: CompiledBundle, values: np.ndarray) -> Assignment:
    """Nearest segment of each row of ``values`` (n, p), which must hold no NaN (impute first)."""
    n = values.shape[0]
    k = compiled.k
    segment = np.empty(n, dtype=np.intp)
    distance = np.empty(n)
    residual = np.zeros(n)
    runner_up = np.empty(n, dtype=np.intp) if k > 1 else None
    runner_distance = np.empty(n) if k > 1 else None
    rows_all = np.arange(min(n, CHUNK_ROWS))
    for start in range(0, n, CHUNK_ROWS):
        x = values[start:start + CHUNK_ROWS]
        rows = rows_all[: x.shape[0]]
        z = x @ compiled.affine
        z += compiled.offset
        # ||z - c||^2 = ||z||^2 - 2 z.c + ||c||^2; the ||z||^2 term does not change the argmin.
        scores = z @ (-2.0 * compiled.centroids.T)
        scores += compiled.centroid_sq_norms
        nearest = scores.argmin(axis=1)
        segment[start:start + x.shape[0]] = nearest
        # Distances recomputed directly for accuracy (the expansion loses digits near a centroid).
        diff = z - compiled.centroids[nearest]
        distance[start:start + x.shape[0]] = np.sqrt(np.einsum("ij,ij->i", diff, diff))
        if k > 1:
            scores[rows, nearest] = np.inf
            second = scores.argmin(axis=1)
            runner_up[start:start + x.shape[0]] = second
            diff = z - compiled.centroids[second]
            runner_distance[start:start + x.shape[0]] = np.sqrt(np.einsum("ij,ij->i", diff, diff))
        if compiled.components is not None:
            # z equals the centred scaled row times the PCA axes, so the reconstruction is z @ axes.
            centred = x * compiled.scale
            centred += compiled.centre_shift
            centred -= z @ compiled.components
            residual[start:start + x.shape[0]] = np.sqrt(np.einsum("ij,ij->i", centred, centred))
    margin = None if runner_distance is None else runner_distance - distance
    far = distance > compiled.distance_thresholds[segment]
    off_plane = residual > compiled.residual_threshold if compiled.components is not None else np.zeros(n, bool)
    return Assignment(segment, distance, runner_up, margin, residual, far, off_plane)


