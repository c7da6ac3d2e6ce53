"""The assign hot path: a bundle compiled into plain numpy arrays.

Imputer-free scaling followed by PCA is one affine map ``z = x @ A + c``. The same product also gives the
record's coordinates in the orthogonal complement of the kept PCA axes, whose length is the PCA residual,
so one matrix product per chunk yields both: ``x @ [A | B] + [c | b]``. Centroids are ranked by the
expansion ``||z - m||^2 = ||z||^2 - 2 z.m + ||m||^2`` (one more small product); rows where that expansion
cannot be trusted to about 1e-10 (a record very close to a centroid, or two centroids nearly tied) are
recomputed directly. Batches are processed in chunks laid out one row per dimension, so that every step
is an elementwise operation over a whole chunk. No scikit-learn call and no DataFrame run per request.
``tests/core/test_assign.py`` checks labels, distances, runner-ups and residuals against the stored
scikit-learn objects on every supported configuration.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler

from service.core.bundle import Bundle

# Records per chunk of the batch path: bounds the temporaries ((d + r) x chunk floats each). On a 2-vCPU
# EPYC (100,000 x 20, d + r = 20, k = 8, one BLAS thread), 8192 and 16384 were fastest, 4096 ~10 % and
# 1024 ~50 % slower: fewer chunks mean fewer numpy calls.
CHUNK_ROWS = 8192
# Up to this many rows, distances to every centroid are computed directly (no expansion, no chunk loop).
DIRECT_ROWS = 16
# The expanded squared distance of a row carries a rounding error of at most a few units of 1e-16 times
# (d + 2) (||z||^2 + ||m||^2) (a dot product of length d, then a sum of three terms). Where the squared
# distance, or the gap between the two best, is under DOUBT times (||z||^2 + max ||m||^2), the row is
# recomputed directly; elsewhere the relative error of a distance stays under about 1e-10 for d <= 100.
DOUBT = 1e-4
RECOMPUTE_ELEMENTS = 1 << 20  # bounds the (rows, k, d) temporary of a direct recompute (8 MiB)


@dataclass(frozen=True)
class CompiledBundle:
    """A fitted bundle as plain arrays. Shapes: p features, d clustering dimensions, r residual dimensions
    (p - kept PCA components; 0 without PCA or when PCA keeps every dimension), k segments."""

    features: tuple[str, ...]
    medians: np.ndarray             # (p,) imputation values
    scale: np.ndarray               # (p,) elementwise scaling: scaled = x * scale + shift
    shift: np.ndarray               # (p,)
    projection: np.ndarray          # (p, d + r): x @ projection + projection_offset = [z | residual coordinates]
    projection_offset: np.ndarray   # (d + r,)
    centroids: np.ndarray           # (k, d)
    centroid_sq_norms: np.ndarray   # (k,)
    distance_thresholds: np.ndarray  # (k,)
    residual_threshold: float

    @property
    def k(self) -> int:
        return int(self.centroids.shape[0])

    @property
    def n_dims(self) -> int:
        """d: dimensions of the clustering space."""
        return int(self.centroids.shape[1])

    @property
    def has_residual(self) -> bool:
        return self.projection.shape[1] > self.n_dims

    @property
    def affine(self) -> np.ndarray:
        """(p, d): x @ affine + offset is the record in the clustering space."""
        return self.projection[:, : self.n_dims]

    @property
    def offset(self) -> np.ndarray:
        return self.projection_offset[: self.n_dims]

    def project(self, values: np.ndarray) -> np.ndarray:
        """(n, p) imputed raw rows (no NaN) -> (n, d) coordinates in the clustering space."""
        return values @ self.affine + self.offset


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


def _complement_basis(axes: np.ndarray) -> np.ndarray:
    """(p, p - d) orthonormal basis of the complement of the row space of ``axes`` (d, p; orthonormal rows).

    For a centred scaled row u, the PCA reconstruction error u - axes.T @ axes @ u is the projection of u
    on this complement, so its length is ||u @ basis||: no difference of nearly equal vectors, and linear
    in the raw row, so it folds into the same product as the PCA scores.
    """
    _, _, vt = np.linalg.svd(axes, full_matrices=True)
    return vt[axes.shape[0]:].T


def compile_bundle(bundle: Bundle) -> CompiledBundle:
    p = len(bundle.features)
    scale, shift = _elementwise_scaling(bundle.scaler, p)
    pca = bundle.pca
    if pca is None:
        basis = np.eye(p)                                   # the clustering space is the scaled space
        centre = shift
    else:
        basis = pca.components_.T                           # (p, d)
        if pca.n_components_ < p:
            basis = np.hstack([basis, _complement_basis(pca.components_)])
        centre = shift - pca.mean_
    centroids = np.ascontiguousarray(bundle.centroids, dtype=np.float64)
    return CompiledBundle(
        features=tuple(bundle.features),
        medians=bundle.imputer.statistics_.astype(np.float64).copy(),
        scale=scale,
        shift=shift,
        projection=np.ascontiguousarray(scale[:, None] * basis),
        projection_offset=centre @ basis,
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
    if values.shape[0] <= DIRECT_ROWS:
        segment, first_sq, runner_up, second_sq, residual = _assign_direct(compiled, values)
    else:
        segment, first_sq, runner_up, second_sq, residual = _assign_chunked(compiled, values)
    distance = np.sqrt(first_sq)
    margin = None if runner_up is None else np.sqrt(second_sq) - distance
    far = distance > compiled.distance_thresholds[segment]
    off_plane = residual > compiled.residual_threshold if compiled.has_residual else np.zeros(residual.size, bool)
    return Assignment(segment, distance, runner_up, margin, residual, far, off_plane)


def _two_nearest(compiled: CompiledBundle, z: np.ndarray):
    """Direct squared distances from each row of ``z`` to every centroid; the two smallest (ties: lower id)."""
    diff = z[:, None, :] - compiled.centroids
    sq = np.einsum("ijk,ijk->ij", diff, diff)                 # (n, k)
    order = np.argsort(sq, axis=1, kind="stable")[:, :2]
    ranked = np.sort(sq, axis=1)[:, :2]                        # the same values as sq at ``order``
    if compiled.k == 1:
        return order[:, 0], ranked[:, 0], None, None
    return order[:, 0], ranked[:, 0], order[:, 1], ranked[:, 1]


def _assign_direct(compiled: CompiledBundle, values: np.ndarray):
    """Few rows: one product, then direct distances to every centroid."""
    d = compiled.n_dims
    projected = values @ compiled.projection
    projected += compiled.projection_offset
    tail = projected[:, d:]
    return (*_two_nearest(compiled, projected[:, :d]), np.sqrt(np.einsum("ij,ij->i", tail, tail)))


def _assign_chunked(compiled: CompiledBundle, values: np.ndarray):
    """Many rows, in chunks. A chunk is projected as a (d + r, rows) array, one row per dimension, so every
    step below is an elementwise operation over the whole chunk (numpy reductions along rows of 5 or 8
    values cost far more per value)."""
    n = values.shape[0]
    d, k = compiled.n_dims, compiled.k
    projection_t = compiled.projection.T                   # (d + r, p); BLAS reads it transposed, no copy
    offset = compiled.projection_offset[:, None]
    minus_two_centroids = -2.0 * compiled.centroids         # (k, d)
    centroid_sq = compiled.centroid_sq_norms[:, None]
    id_mask = np.int64((1 << max(1, (k - 1).bit_length())) - 1)
    ids = np.arange(k, dtype=np.int64)[:, None]
    z_sq, tail_sq = np.empty(n), np.empty(n)
    first, first_sq = np.empty(n, dtype=np.intp), np.empty(n)
    second = np.empty(n, dtype=np.intp) if k > 1 else None
    second_sq = np.empty(n) if k > 1 else None
    for start in range(0, n, CHUNK_ROWS):
        stop = min(start + CHUNK_ROWS, n)
        columns = np.arange(stop - start)
        projected = projection_t @ values[start:stop].T     # (d + r, rows): [z | residual coordinates]
        projected += offset
        squares = projected * projected
        np.add.reduce(squares[:d], axis=0, out=z_sq[start:stop])
        np.add.reduce(squares[d:], axis=0, out=tail_sq[start:stop])
        scores = minus_two_centroids @ projected[:d]         # (k, rows): ||z - m||^2 - ||z||^2
        scores += centroid_sq
        # Rank on a copy whose lowest mantissa bits hold the segment id: the two smallest then come from
        # elementwise minimum/maximum over the k rows, and each winner carries its id. Tagging moves a score
        # by a few units in the last place, which can only matter for a near tie: recomputed below.
        tagged = scores.copy()
        bits = tagged.view(np.int64)
        bits &= ~id_mask
        bits |= ids
        best = tagged[0].copy()
        runner = np.full(stop - start, np.inf)
        for row in tagged[1:]:
            np.minimum(runner, np.maximum(best, row), out=runner)
            np.minimum(best, row, out=best)
        flat = scores.ravel()
        first[start:stop] = best.view(np.int64) & id_mask
        first_sq[start:stop] = flat.take(first[start:stop] * columns.size + columns)
        if k > 1:
            second[start:stop] = runner.view(np.int64) & id_mask
            second_sq[start:stop] = flat.take(second[start:stop] * columns.size + columns)
    first_sq += z_sq
    doubt = DOUBT * (z_sq + compiled.centroid_sq_norms.max())
    doubtful = first_sq < doubt
    if k > 1:
        second_sq += z_sq
        doubtful |= second_sq - first_sq < doubt
    rows = np.flatnonzero(doubtful)
    step = max(1, RECOMPUTE_ELEMENTS // (k * d))
    for part in (rows[i:i + step] for i in range(0, rows.size, step)):
        nearest, nearest_sq, runner_up, runner_up_sq = _two_nearest(compiled, values[part] @ compiled.affine
                                                                    + compiled.offset)
        first[part], first_sq[part] = nearest, nearest_sq
        if k > 1:
            second[part], second_sq[part] = runner_up, runner_up_sq
    return first, first_sq, second, second_sq, np.sqrt(tail_sq)
