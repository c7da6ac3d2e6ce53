"""The assign hot path: a bundle compiled into plain numpy arrays.

Imputer-free scaling is elementwise: ``u = (x - centre) * scale - space_centre``, the centre subtracted FIRST
(as scikit-learn's scalers do), so a feature with a large offset (1e9 + N(0, 1)) does not cancel; the PCA
mean of the scaled data is folded into ``space_centre``. PCA scores are then ``z = u @ axes.T`` and the PCA
residual is the length of ``u - z @ axes``, the row minus its reconstruction, computed per chunk: memory
linear in p x d (no p x p basis of the orthogonal complement is ever built). Without PCA the clustering
space is ``u`` itself. Centroids are ranked by the expansion ``||z - m||^2 = ||z||^2 - 2 z.m + ||m||^2`` (one
more small product); rows where that expansion cannot be trusted to about 1e-10 (a record very close to a
centroid, or two centroids nearly tied) are recomputed directly. Batches are processed in chunks laid out one
row per dimension, so that every step is an elementwise operation over a whole chunk. No scikit-learn call
and no DataFrame run per request.

One record (the single-record call, where each numpy call costs about a microsecond whatever its size) is
scored with one product: the projection, the centroids' cross terms and the projection onto the complement of
the PCA plane are folded into one (p, k + d + p) matrix when the bundle is built (``SingleRecordForm``), so
``u @ matrix`` gives every ``z.m``, ``z`` and the residual vector at once (computed on a buffer of the record's
Python numbers, the offset folded in too: ``SingleRecordForm.product``); the same expansion and the same
recompute rule as the batch path apply. That matrix holds p x p entries, so it is built only while it stays
under ``FOLD_MAX_ENTRIES``; larger bundles score one record step by step (still no p x p matrix).
``tests/core/test_assign.py`` checks labels, distances, runner-ups and residuals against the stored scikit-learn
objects on every supported configuration.

The outlier flag is per segment: a record of segment c is flagged when its distance exceeds
``distance_thresholds[c]`` or its residual exceeds ``residual_thresholds[c]`` (both calibrated together on
held-out rows by ``service.core.calibration``).
"""

from __future__ import annotations

import math
from array import array
from dataclasses import dataclass
from functools import cached_property
from operator import sub
from typing import NamedTuple, Sequence

import numpy as np
from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler

from service.core.bundle import Bundle

# Records per chunk of the batch path: bounds the temporaries ((d + p) x chunk floats each). On a 2-vCPU
# EPYC (100,000 x 20, k = 8, one BLAS thread), 8192 and 16384 were fastest, 4096 ~10 % and 1024 ~50 %
# slower: fewer chunks mean fewer numpy calls.
CHUNK_ROWS = 8192
# Up to this many rows, distances to every centroid are computed directly (no expansion, no chunk loop).
DIRECT_ROWS = 16
# The expanded squared distance of a row carries a rounding error of at most a few units of 1e-16 times
# (d + 2) (||z||^2 + ||m||^2) (a dot product of length d, then a sum of three terms). Where the squared
# distance, or the gap between the two best, is under DOUBT times (||z||^2 + max ||m||^2), the row is
# recomputed directly; elsewhere the relative error of a distance stays under about 1e-10 for d <= 100.
DOUBT = 1e-4
RECOMPUTE_ELEMENTS = 1 << 20  # bounds the (rows, k, d) temporary of a direct recompute (8 MiB)
# Largest folded single-record matrix (p x (k + d + p) floats, 256 KiB): beyond it the product costs more than
# the numpy calls it saves, and the p x p block would grow with the square of the feature count.
FOLD_MAX_ENTRIES = 32_768
# The centre is folded into the single-record offset (one numpy call less) only while every |centre * scale| is at
# most this: a raw value then exceeds its centred scaled form by at most ~1e3 standard units, so computing
# x * scale and subtracting centre * scale afterwards loses at most ~3 of float64's ~16 digits. A feature like
# 1e9 + N(0, 1) would lose 9: there the centre is subtracted first.
CENTRE_FOLD_LIMIT = 1e3


@dataclass(frozen=True)
class SingleRecordForm:
    """The single-record path's constants, derived from a ``CompiledBundle`` when it is built (never stored):
    ``(x - centre) @ matrix - offset`` is ``[z.m_0 .. z.m_{k-1}, z_0 .. z_{d-1}, r_0 .. r_{t-1}]`` for a raw row
    ``x`` (no NaN), with ``z`` its clustering coordinates and ``r`` the centred scaled row minus its PCA
    reconstruction (t = p when PCA drops dimensions, else 0). The scale is folded into the matrix's rows and the
    space centre into ``offset``; so is the centre (``centre`` None) where that costs at most a few digits
    (``CENTRE_FOLD_LIMIT``), else it is subtracted first (no cancellation of a large offset).

    ``product`` is the same map as one matrix-vector product: ``product @ [x_0 .. x_{p-1}, 1]``, the offset in the
    last column, so that a record read as Python numbers is scored with a single numpy call on a buffer of its
    values (no array built from Python objects, no subtraction as a second call)."""

    matrix: np.ndarray                # (p, k + d + t)
    offset: np.ndarray                # (k + d + t,)
    centre: np.ndarray | None         # (p,) subtracted before the product, or None when folded into offset
    k: int
    d: int
    centroid_sq_norms: list[float]    # ||m_c||^2 as Python floats
    doubt_floor: float                # max ||m_c||^2 (the expansion's error scale, as in _assign_chunked)

    @cached_property
    def product(self) -> np.ndarray:
        """(k + d + t, p + 1): ``matrix`` transposed, then minus ``offset`` as its last column."""
        return np.ascontiguousarray(np.hstack([self.matrix.T, -self.offset[:, None]]))

    @cached_property
    def centre_list(self) -> list[float] | None:
        """``centre`` as Python floats (subtracted from a record's Python numbers one by one), or None."""
        return None if self.centre is None else self.centre.tolist()


def fold_single_record(compiled: "CompiledBundle") -> SingleRecordForm | None:
    """The folded matrix of ``SingleRecordForm``, or None when it would exceed ``FOLD_MAX_ENTRIES``."""
    p, (k, d) = compiled.scale.shape[0], compiled.centroids.shape
    t = p if compiled.has_residual else 0
    if p * (k + d + t) > FOLD_MAX_ENTRIES:
        return None
    to_space = np.eye(p) if compiled.axes is None else compiled.axes.T        # (p, d): z = u @ to_space
    blocks = [to_space @ compiled.centroids.T, to_space]
    if t:
        blocks.append(np.eye(p) - compiled.axes.T @ compiled.axes)             # u minus its reconstruction
    folded = np.hstack(blocks)                                                # u @ folded, u centred and scaled
    norms = compiled.centroid_sq_norms
    offset = compiled.space_centre @ folded
    centre = compiled.centre
    if np.all(np.abs(centre * compiled.scale) <= CENTRE_FOLD_LIMIT):
        offset, centre = offset + (centre * compiled.scale) @ folded, None
    form = SingleRecordForm(np.ascontiguousarray(compiled.scale[:, None] * folded), offset, centre,
                            k, d, norms.tolist(), float(norms.max()))
    form.product, form.centre_list         # built with the bundle, not by the first record
    return form


@dataclass(frozen=True)
class CompiledBundle:
    """A fitted bundle as plain arrays. Shapes: p features, d clustering dimensions, k segments."""

    features: tuple[str, ...]
    medians: np.ndarray             # (p,) imputation values
    centre: np.ndarray              # (p,) subtracted first: u = (x - centre) * scale - space_centre
    scale: np.ndarray               # (p,)
    space_centre: np.ndarray        # (p,) the scaled training mean PCA removes (minus a MinMax range start)
    axes: np.ndarray | None         # (d, p) orthonormal PCA axes; None without PCA (the space is u itself)
    centroids: np.ndarray           # (k, d)
    centroid_sq_norms: np.ndarray   # (k,)
    distance_thresholds: np.ndarray  # (k,)
    residual_thresholds: np.ndarray  # (k,) 0 without a residual

    def __post_init__(self) -> None:
        self.single_record_form          # built with the bundle (compile_bundle or an artifact read), not per call

    @cached_property
    def single_record_form(self) -> SingleRecordForm | None:
        return fold_single_record(self)

    @cached_property
    def distance_thresholds_list(self) -> list[float]:
        """The thresholds as Python floats (the single-record path compares floats, not arrays)."""
        return self.distance_thresholds.tolist()

    @cached_property
    def residual_thresholds_list(self) -> list[float]:
        return self.residual_thresholds.tolist()

    @property
    def k(self) -> int:
        return int(self.centroids.shape[0])

    @property
    def n_dims(self) -> int:
        """d: dimensions of the clustering space."""
        return int(self.centroids.shape[1])

    @cached_property
    def has_residual(self) -> bool:
        """Whether PCA drops dimensions (then records have a reconstruction error)."""
        return self.axes is not None and self.axes.shape[0] < self.axes.shape[1]

    @property
    def affine(self) -> np.ndarray:
        """(p, d) matrix A with ``project(x) == (x - centre) @ A + offset`` (built on demand, for benchmarks)."""
        if self.axes is None:
            return np.diag(self.scale)
        return self.scale[:, None] * self.axes.T

    @property
    def offset(self) -> np.ndarray:
        return -self.space_centre if self.axes is None else -(self.axes @ self.space_centre)

    def centred(self, values: np.ndarray) -> np.ndarray:
        """(n, p) imputed raw rows -> the centred scaled rows u (the PCA mean removed)."""
        u = values - self.centre
        u *= self.scale
        u -= self.space_centre
        return u

    def project(self, values: np.ndarray) -> np.ndarray:
        """(n, p) imputed raw rows (no NaN) -> (n, d) coordinates in the clustering space."""
        u = self.centred(values)
        return u if self.axes is None else u @ self.axes.T

    def residuals(self, values: np.ndarray) -> np.ndarray:
        """(n,) length of each centred scaled row minus its PCA reconstruction (0 without a residual)."""
        if not self.has_residual:
            return np.zeros(values.shape[0])
        u = self.centred(values)
        u -= (u @ self.axes.T) @ self.axes
        return np.sqrt(np.einsum("ij,ij->i", u, u))


class OneAssignment(NamedTuple):
    """One record's assignment as Python numbers (``assign_one``): the fields of ``Assignment`` for one row."""

    segment: int
    distance: float
    runner_up: int | None       # None when k == 1
    margin: float | None        # None when k == 1
    residual: float
    far: bool
    off_plane: bool


@dataclass(slots=True)      # not frozen: a frozen dataclass's __init__ costs ~1 us, a tenth of one record's scoring
class Assignment:
    segment: np.ndarray            # (n,) int
    distance: np.ndarray           # (n,) to the nearest centroid
    runner_up: np.ndarray | None   # (n,) int, None when k == 1
    margin: np.ndarray | None      # runner-up distance minus nearest distance
    residual: np.ndarray           # (n,) distance to the PCA reconstruction (0 without PCA)
    far: np.ndarray                # (n,) bool: distance over the segment's threshold
    off_plane: np.ndarray          # (n,) bool: residual over the segment's residual threshold
    # One record scored by the single-record path: the same values as Python numbers (``assign_one``'s answer),
    # so that callers reading one record need not read them back out of the arrays. None otherwise.
    one: OneAssignment | None = None

    @property
    def outlier(self) -> np.ndarray:
        return self.far | self.off_plane


def elementwise_scaling(scaler, n_features: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(centre, scale, after) with ``scaler.transform(x) == (x - centre) * scale + after``.

    The centre is subtracted before scaling, as StandardScaler and RobustScaler do (``(x - mean_) / scale_``);
    MinMaxScaler computes ``x * scale_ + min_``, which equals ``(x - data_min_) * scale_ + range start`` and
    is taken in that form so that a large offset does not cancel.
    """
    if scaler is None:
        return np.zeros(n_features), np.ones(n_features), np.zeros(n_features)
    if isinstance(scaler, StandardScaler):
        centre = scaler.mean_ if scaler.with_mean else np.zeros(n_features)
        return centre.astype(np.float64).copy(), 1.0 / scaler.scale_, np.zeros(n_features)
    if isinstance(scaler, RobustScaler):
        return scaler.center_.astype(np.float64).copy(), 1.0 / scaler.scale_, np.zeros(n_features)
    if isinstance(scaler, MinMaxScaler):
        start = float(scaler.feature_range[0])
        return scaler.data_min_.astype(np.float64).copy(), scaler.scale_.copy(), np.full(n_features, start)
    raise TypeError(f"no elementwise form for {type(scaler).__name__}")


def compile_bundle(bundle: Bundle) -> CompiledBundle:
    """Plain arrays for the hot path; memory linear in p x d (no p x p matrix; see the module docstring)."""
    p = len(bundle.features)
    centre, scale, after = elementwise_scaling(bundle.scaler, p)
    pca = bundle.pca
    space_centre = -after if pca is None else pca.mean_.astype(np.float64) - after
    axes = None if pca is None else np.ascontiguousarray(pca.components_, dtype=np.float64)
    centroids = np.ascontiguousarray(bundle.centroids, dtype=np.float64)
    return CompiledBundle(
        features=tuple(bundle.features),
        medians=bundle.imputer.statistics_.astype(np.float64).copy(),
        centre=centre,
        scale=np.asarray(scale, dtype=np.float64),
        space_centre=np.asarray(space_centre, dtype=np.float64),
        axes=axes,
        centroids=centroids,
        centroid_sq_norms=np.einsum("ij,ij->i", centroids, centroids),
        distance_thresholds=np.asarray(bundle.distance_thresholds, dtype=np.float64),
        residual_thresholds=np.asarray(bundle.residual_thresholds, dtype=np.float64),
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
    if values.shape[0] == 1:
        return as_assignment(assign_one(compiled, values[0]))
    if values.shape[0] <= DIRECT_ROWS:
        segment, first_sq, runner_up, second_sq, residual = _assign_direct(compiled, values)
    else:
        segment, first_sq, runner_up, second_sq, residual = _assign_chunked(compiled, values)
    distance = np.sqrt(first_sq)
    margin = None if runner_up is None else np.sqrt(second_sq) - distance
    far = distance > compiled.distance_thresholds[segment]
    off_plane = (residual > compiled.residual_thresholds[segment] if compiled.has_residual
                 else np.zeros(residual.size, bool))
    return Assignment(segment, distance, runner_up, margin, residual, far, off_plane)


def assign_one(compiled: CompiledBundle, row: Sequence[float]) -> OneAssignment:
    """One record with no NaN (p numbers: a tuple of Python numbers, as the single-record call reads them, or a
    1-D array) -> its assignment as Python numbers (``as_assignment`` makes the arrays).

    One product with the folded matrix (``SingleRecordForm.product``) on a buffer of the record's values, then
    the ranking of the k squared distances, the residual and the threshold tests on Python floats: two numpy
    calls (the product and ``tolist``). Each numpy call costs about a microsecond however small its array, and
    several when the caches are cold, as between a server's requests; building an array from Python numbers
    costs more. Where the expansion is in doubt (as the batch path's rule says), a value is not finite, or the
    bundle has no folded matrix: ``_assign_one_directly``."""
    form = compiled.single_record_form
    if form is None:
        return _assign_one_directly(compiled, np.asarray(row, dtype=np.float64))
    if type(row) is np.ndarray:
        row = row.tolist()                                  # Python floats: the buffer and the fallback read them
    values = array("d", row if form.centre_list is None else map(sub, row, form.centre_list))
    values.append(1.0)
    out = form.product.dot(values).tolist()
    k, d = form.k, form.d
    z_sq = math.hypot(*out[k:k + d]) ** 2
    squared = [z_sq - 2.0 * cross + norm for cross, norm in zip(out[:k], form.centroid_sq_norms)]
    order = sorted(range(k), key=squared.__getitem__)      # stable: ties go to the lower id
    nearest = order[0]
    doubt = DOUBT * (z_sq + form.doubt_floor)
    if not (doubt < math.inf and squared[nearest] >= doubt
            and (k == 1 or squared[order[1]] - squared[nearest] >= doubt)):
        return _assign_one_directly(compiled, np.array(row, dtype=np.float64))   # also NaN, overflow: False above
    has_residual = compiled.has_residual
    residual = math.hypot(*out[k + d:]) if has_residual else 0.0
    return _one_values(compiled, order, squared, residual, has_residual)


def _assign_one_directly(compiled: CompiledBundle, row: np.ndarray) -> OneAssignment:
    """One record step by step: the direct path's arithmetic on vectors (no expansion, no p x p matrix)."""
    u = row - compiled.centre
    u *= compiled.scale
    u -= compiled.space_centre
    axes, has_residual = compiled.axes, compiled.has_residual
    if axes is None:
        z, residual = u, 0.0
    else:
        z = axes @ u
        if has_residual:
            u -= z @ axes                                   # the row minus its reconstruction
            residual = math.sqrt(float(u @ u))
        else:
            residual = 0.0
    diff = z - compiled.centroids
    squared = np.einsum("ij,ij->i", diff, diff).tolist()   # (k,) direct squared distances, as _two_nearest
    order = sorted(range(len(squared)), key=squared.__getitem__)   # stable: ties go to the lower id
    return _one_values(compiled, order, squared, residual, has_residual)


def _one_values(compiled: CompiledBundle, order: list[int], squared: list[float], residual: float,
                has_residual: bool) -> OneAssignment:
    """``assign_one``'s answer from the ranked squared distances and the residual (Python floats)."""
    nearest = order[0]
    distance = math.sqrt(squared[nearest])
    far = distance > compiled.distance_thresholds_list[nearest]
    off_plane = has_residual and residual > compiled.residual_thresholds_list[nearest]
    if len(order) > 1:
        runner = order[1]
        return OneAssignment(nearest, distance, runner, math.sqrt(squared[runner]) - distance, residual, far,
                             off_plane)
    return OneAssignment(nearest, distance, None, None, residual, far, off_plane)


def as_assignment(one: OneAssignment) -> Assignment:
    """``assign_one``'s answer as a one-record Assignment (which keeps it as ``one``)."""
    segment, distance, runner_up, margin, residual, far, off_plane = one
    # One array per type, sliced into the 1-element fields (a slice costs a third of a new array).
    flags = np.array([far, off_plane])
    if runner_up is not None:
        segments = np.array([segment, runner_up])
        floats = np.array([distance, residual, margin])
        runner_ups, margins = segments[1:], floats[2:]
    else:
        segments, floats = np.array([segment]), np.array([distance, residual])
        runner_ups = margins = None
    return Assignment(segments[:1], floats[:1], runner_ups, margins, floats[1:2], flags[:1], flags[1:], one)


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
    """Few rows: project, then direct distances to every centroid."""
    u = compiled.centred(values)
    z = u if compiled.axes is None else u @ compiled.axes.T
    if compiled.has_residual:
        u -= z @ compiled.axes
        residual = np.sqrt(np.einsum("ij,ij->i", u, u))
    else:
        residual = np.zeros(values.shape[0])
    return (*_two_nearest(compiled, z), residual)


def _project_chunk(compiled: CompiledBundle, chunk: np.ndarray, tail_sq: np.ndarray) -> np.ndarray:
    """(d, rows) clustering coordinates of a chunk, one row per dimension; writes squared residuals to tail_sq."""
    # Centred and projected in the records' own (row) layout: every pass reads memory in order. (Transposing
    # the chunk first cost ~30 % more: the subtraction then read it across rows.) Only the small (rows, d)
    # result is transposed, for the elementwise ranking below.
    u = np.subtract(chunk, compiled.centre)              # the centre first (no cancellation)
    u *= compiled.scale
    u -= compiled.space_centre
    if compiled.axes is None:
        tail_sq[:] = 0.0
        return np.ascontiguousarray(u.T)
    z = u @ compiled.axes.T                               # (rows, d)
    if compiled.has_residual:
        u -= z @ compiled.axes                            # the row minus its reconstruction
        np.einsum("ij,ij->i", u, u, out=tail_sq)
    else:
        tail_sq[:] = 0.0
    return np.ascontiguousarray(z.T)


def _assign_chunked(compiled: CompiledBundle, values: np.ndarray):
    """Many rows, in chunks. A chunk is projected as a (d, rows) array, one row per dimension, so every
    step below is an elementwise operation over the whole chunk (numpy reductions along rows of 5 or 8
    values cost far more per value)."""
    n = values.shape[0]
    d, k = compiled.n_dims, compiled.k
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
        projected = _project_chunk(compiled, values[start:stop], tail_sq[start:stop])   # (d, rows)
        np.add.reduce(projected * projected, axis=0, out=z_sq[start:stop])
        scores = minus_two_centroids @ projected             # (k, rows): ||z - m||^2 - ||z||^2
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
        nearest, nearest_sq, runner_up, runner_up_sq = _two_nearest(compiled, compiled.project(values[part]))
        first[part], first_sq[part] = nearest, nearest_sq
        if k > 1:
            second[part], second_sq[part] = runner_up, runner_up_sq
    return first, first_sq, second, second_sq, np.sqrt(tail_sq)
