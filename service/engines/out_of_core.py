"""Out-of-core fit: the in-memory fit's steps (``service.core.fit.fit_bundle``) as streaming passes over the
training file, so memory holds one chunk of the matrix plus a few numbers per row, never the matrix.

What is exact and what is approximate (see README, "Big inputs"):

- Medians (imputation, robust scaling, segment profiles) and the drift reference's decile edges: exact, by bin
  refinement (``service.engines.order_stats``); quantiles equal numpy's to rounding.
- Scaling statistics: scikit-learn's ``partial_fit`` (StandardScaler, MinMaxScaler; Chan's pairwise update).
- PCA: ``IncrementalPCA`` over chunks, all components kept (their eigenvalues also give the residual limit), then
  truncated to the requested count or variance share by PCA's own rule. Incremental SVD agrees with the full
  one to rounding when every component is kept.
- Clustering: for each k, ``MiniBatchKMeans`` (``n_init`` initialisations on a seeded sample of
  ``CLUSTER_SAMPLE`` rows, then one mini-batch epoch over every chunk), refined by ``LLOYD_PASSES`` full-data
  Lloyd passes; the curve's distortion is the exact mean squared distance over all rows; the silhouette is
  computed on a seeded sample of ``silhouette_sample`` rows (the in-memory fit samples too). K-means is a local
  optimum either way: the two engines agree closely on well-separated data, not bit for bit.
- Held-out thresholds: the same cross-fitted split-conformal calibration (``service.core.calibration``); each
  fold's imputer, scaler and PCA are fitted on the other folds in streaming passes, and its centroids are
  refined by ``FOLD_LLOYD_PASSES`` Lloyd passes (the in-memory fit runs Lloyd to convergence).
- Drift reference, profiles, sizes, data_sha256: exact, as in memory.
"""

from __future__ import annotations

import hashlib
import math
import tempfile
from pathlib import Path
from typing import Any, Callable

import numpy as np
import sklearn
from sklearn.cluster import MiniBatchKMeans
from sklearn.decomposition import IncrementalPCA
from sklearn.impute import SimpleImputer
from sklearn.preprocessing import RobustScaler

from service.core.bundle import Bundle, FitConfig, ReferenceProfile
from service.core.calibration import (
    MIN_CROSS_FIT_ROWS,
    Calibration,
    _folds,
    calibrate_scores,
    segment_medians,
)
from service.core.fit import (
    DECILES,
    MAX_CATEGORIES,
    SCALERS,
    _centroids_in_raw_units,
    _DISTINCT_PROBE_ROWS,
    _fit_warnings,
    _nearest,
    _silhouette,
    check_fit_facts,
    choose_k,
    feature_unusable_because,
    jackson_mudholkar_limit,
)
from service.core.report import fit_report
from service.engines import order_stats
from service.engines.source import MatrixFile
from service.errors import InvalidInput

Progress = Callable[[str, float], None]

CLUSTER_SAMPLE = 50_000
LLOYD_PASSES = 3
FOLD_LLOYD_PASSES = 3
MINI_BATCH = 4096
SILHOUETTE_WORKING_MIB = 64
# Overall progress at the start of each step (the server's "saving" follows "profiling").
_STEP_START = {"reading": 0.0, "scaling": 0.08, "reducing": 0.18, "clustering": 0.28, "profiling": 0.75}
_STEP_END = 0.97


class _Steps:
    """Calls ``progress(step, overall fraction)``; the fraction never goes back."""

    def __init__(self, progress: Progress | None):
        self.progress, self.last = progress, 0.0

    def __call__(self, step: str, within: float = 0.0, *, start: float | None = None, end: float | None = None):
        if self.progress is None:
            return
        keys = list(_STEP_START)
        name = step.split(" ")[0]
        low = _STEP_START[name] if start is None else start
        high = (_STEP_START[keys[keys.index(name) + 1]] if name != keys[-1] else _STEP_END) if end is None else end
        self.last = max(self.last, low + (high - low) * min(max(within, 0.0), 1.0))
        self.progress(step, self.last)


# --------------------------------------------------------------------------- column moments
class ColumnMoments:
    """Per column over observed (non-NaN) values: count, mean, sum of squared deviations (Chan et al.'s pairwise
    update, 1979), minimum, maximum; and missing counts."""

    def __init__(self, p: int):
        self.count = np.zeros(p, dtype=np.int64)
        self.mean = np.zeros(p)
        self.m2 = np.zeros(p)
        self.low = np.full(p, np.inf)
        self.high = np.full(p, -np.inf)
        self.missing = np.zeros(p, dtype=np.int64)

    def update(self, block: np.ndarray) -> None:
        observed = ~np.isnan(block)
        c = observed.sum(axis=0)
        self.missing += block.shape[0] - c
        if not c.any():
            return
        with np.errstate(invalid="ignore", divide="ignore"):
            filled = np.where(observed, block, 0.0)
            mean_b = filled.sum(axis=0) / np.maximum(c, 1)
            m2_b = (np.where(observed, block - mean_b, 0.0) ** 2).sum(axis=0)
            total = self.count + c
            delta = mean_b - self.mean
            share = np.where(total > 0, c / np.maximum(total, 1), 0.0)
            self.mean = np.where(c > 0, self.mean + delta * share, self.mean)
            self.m2 = np.where(c > 0, self.m2 + m2_b + delta ** 2 * self.count * share, self.m2)
            self.low = np.fmin(self.low, np.where(observed, block, np.inf).min(axis=0))
            self.high = np.fmax(self.high, np.where(observed, block, -np.inf).max(axis=0))
        self.count = total

    @property
    def std(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count > 0, np.sqrt(self.m2 / np.maximum(self.count, 1)), np.nan)

    def unusable(self, features: list[str]) -> dict[str, str]:
        """``service.core.fit.unusable_features`` from the moments."""
        reasons = {}
        std = self.std
        for j, name in enumerate(features):
            if self.count[j] == 0:
                reasons[name] = "every value is missing"
                continue
            why = feature_unusable_because(float(max(abs(self.low[j]), abs(self.high[j]))), float(std[j]),
                                           bool(self.low[j] == self.high[j]))
            if why is not None:
                reasons[name] = why
        return reasons


# --------------------------------------------------------------------------- the fit
def fit_out_of_core(source: MatrixFile, config: FitConfig, *, max_agglomerative_rows: int = 20_000,
                    progress: Progress | None = None, work_dir: Path | None = None) -> Bundle:
    """Fit the whole bundle from ``source`` in streaming passes (see the module docstring)."""
    steps = _Steps(progress)
    n, p = source.shape
    features = list(config.features)
    if config.method != "kmeans":
        raise InvalidInput(f"the out_of_core engine clusters with k-means only; method {config.method!r} needs "
                           "the memory engine", field="method")
    steps("reading")
    moments = ColumnMoments(p)
    digest = hashlib.sha256(f"{n}x{p}:".encode())
    for start, block in source.chunks():
        moments.update(block)
        digest.update(np.ascontiguousarray(block).tobytes())
        steps("reading", (start + block.shape[0]) / max(n, 1))

    medians_cache: list[np.ndarray] = []

    def medians() -> np.ndarray:
        if not medians_cache:
            medians_cache.append(_medians(source, moments))
        return medians_cache[0]

    check_fit_facts((n, p), config, max_agglomerative_rows=max_agglomerative_rows,
                    unusable=lambda: moments.unusable(features),
                    distinct_at_least=lambda needed: _distinct_rows_at_least(source, medians(), needed))
    q = config.outlier_quantile

    steps("scaling")
    med = medians()
    imputer = SimpleImputer(strategy="median").fit(med[None, :])     # statistics_ = the exact medians
    scaler = _fit_scaler(SCALERS[config.scaling], _imputed_chunks(source, med), n, p)
    steps("scaling", 1.0)

    def scaled_of(block: np.ndarray) -> np.ndarray:
        imputed = np.where(np.isnan(block), med, block)
        return imputed if scaler is None else scaler.transform(imputed)

    steps("reducing")
    pca, eigenvalues = None, np.zeros(0)
    if config.components is not None:
        pca, eigenvalues = _fit_pca(source, scaled_of, config.components, n, p, seed=config.seed)
    d = p if pca is None else int(pca.n_components_)

    with tempfile.TemporaryDirectory(prefix="segscore-ooc-", dir=work_dir or source.path.parent) as scratch:
        space_file = _write_space(source, scaled_of, pca, Path(scratch) / "space.f64", d)
        steps("reducing", 1.0)

        ks = list(range(config.k_min, config.k_max + 1))
        cluster_rows = _sample_rows(n, CLUSTER_SAMPLE, config.seed + 1)
        silhouette_rows = _sample_rows(n, config.silhouette_sample, config.seed + 2)
        cluster_sample, silhouette_sample = _gather(space_file, [cluster_rows, silhouette_rows])
        curve: list[dict[str, Any]] = []
        fitted: dict[int, tuple[MiniBatchKMeans, np.ndarray]] = {}
        span = (_STEP_START["profiling"] - _STEP_START["clustering"]) / len(ks)
        for i, k in enumerate(ks):
            low = _STEP_START["clustering"] + i * span
            steps(f"clustering k={k}", 0.0, start=low, end=low + span)
            model, centres, inertia = _cluster(space_file, cluster_sample, k, config,
                                               lambda f, low=low: steps(f"clustering k={k}", f, start=low,
                                                                        end=low + span))
            labels = _nearest(silhouette_sample, centres)
            # scikit-learn computes the sample's distance matrix in blocks of at most working_memory MiB (1 GiB
            # by default, 800 MB for 10,000 rows at once): smaller blocks keep the engine's peak low, same result.
            with sklearn.config_context(working_memory=SILHOUETTE_WORKING_MIB):
                silhouette = _silhouette(silhouette_sample, labels, config)
            curve.append({"k": k, "distortion": inertia / n, "inertia": inertia, "silhouette": silhouette})
            fitted[k] = (model, centres)
        chosen, method = choose_k(curve, config)
        clusterer, centroids = fitted[chosen]
        del fitted

        steps("profiling")
        # The assign rule over every row: segment, distance, residual (a few numbers per row, never the matrix).
        nearest = np.empty(n, dtype=np.intp)
        distances = np.empty(n)
        residuals = np.zeros(n)
        has_residual = pca is not None and d < p
        for (start, raw), (_, space) in zip(source.chunks(), space_file.chunks(source.chunk_rows())):
            stop = start + raw.shape[0]
            nearest[start:stop] = _nearest(space, centroids)
            diff = space - centroids[nearest[start:stop]]
            distances[start:stop] = np.sqrt(np.einsum("ij,ij->i", diff, diff))
            if has_residual:
                residuals[start:stop] = _residual(scaled_of(raw), pca)
    labels = nearest            # the clusterer's labels are its nearest centroids after the Lloyd passes
    residual_limit = jackson_mudholkar_limit(eigenvalues[d:], q) if has_residual else 0.0
    raw_centroids = _centroids_in_raw_units(centroids, scaler, pca)
    steps("profiling", 0.1)
    calibration = _calibrate(source, config, segments=nearest, labels=labels, raw_centroids=raw_centroids,
                             in_sample_distance=distances, in_sample_residual=residuals, has_residual=has_residual,
                             n_components=None if pca is None else d, moments=moments, medians=med)
    steps("profiling", 0.7)
    rng = np.random.default_rng(config.seed)
    sample_rows = np.sort(rng.choice(n, size=min(n, config.reference_sample), replace=False))
    reference = _reference_profile(source, moments, nearest, chosen, calibration, sample_rows)
    steps("profiling", 0.85)
    segments = _describe_segments(source, moments, nearest, raw_centroids, calibration, chosen, features)
    steps("profiling", 1.0)

    report = fit_report(
        config, n_records=n, pca=pca, imputer=imputer, curve=curve, chosen=chosen, method=method,
        inertia=float(np.sum(distances ** 2)), segments=segments, centroid_agreement=1.0,
        residual_threshold=calibration.pooled_residual_threshold, residual_limit=residual_limit, reference=reference,
        calibration=calibration.as_report(q), data_sha256=digest.hexdigest(),
        warnings=_fit_warnings(config, labels, nearest, chosen, n), engine="out_of_core")
    return Bundle(features=features, config=config, imputer=imputer, scaler=scaler, pca=pca, clusterer=clusterer,
                  centroids=np.ascontiguousarray(centroids, dtype=np.float64),
                  distance_thresholds=calibration.distance_thresholds,
                  residual_thresholds=calibration.residual_thresholds,
                  residual_threshold=calibration.pooled_residual_threshold, residual_limit_jm=residual_limit,
                  reference=reference, report=report)


# --------------------------------------------------------------------------- steps
def _plain_chunks(source: MatrixFile, groups: np.ndarray | None = None):
    def chunks():
        for start, block in source.chunks():
            yield block, None if groups is None else groups[start:start + block.shape[0]]
    return chunks


def _imputed_chunks(source: MatrixFile, medians: np.ndarray, rows: np.ndarray | None = None):
    """Chunks with missing values filled by ``medians``; ``rows`` (bool per row) keeps only those rows."""
    def chunks():
        for start, block in source.chunks():
            filled = np.where(np.isnan(block), medians, block)
            yield filled if rows is None else filled[rows[start:start + block.shape[0]]]
    return chunks


def _medians(source: MatrixFile, moments: ColumnMoments, groups: np.ndarray | None = None,
             group: int = 0) -> np.ndarray:
    """Exact medians of the observed values per column (0 for a column with none: SimpleImputer's
    keep_empty_features), over every row or over the rows whose ``groups`` value is ``group``."""
    chunks = _plain_chunks(source, groups)
    n_groups = 1 if groups is None else int(groups.max()) + 1
    p = source.shape[1]
    if groups is None:
        counts, lows, highs = moments.count[None, :], moments.low[None, :], moments.high[None, :]
    else:
        counts, lows, highs = order_stats.counts_and_ranges(chunks, n_groups, p)
    wanted = [(group, j, r) for j in range(p) if counts[group, j] > 0
              for r in order_stats.median_ranks(int(counts[group, j]))]
    found = order_stats.order_statistics(chunks, wanted, counts=counts, lows=lows, highs=highs)
    return np.array([order_stats.median_from(found, group, j, int(counts[group, j])) if counts[group, j] else 0.0
                     for j in range(p)])


def _distinct_rows_at_least(source: MatrixFile, medians: np.ndarray, needed: int) -> int:
    """min(needed, distinct rows after median imputation), stopping as soon as ``needed`` are seen."""
    seen: np.ndarray | None = None
    for _, block in source.chunks(rows=_DISTINCT_PROBE_ROWS):
        filled = np.where(np.isnan(block), medians, block)
        seen = np.unique(filled if seen is None else np.vstack([seen, filled]), axis=0)
        if seen.shape[0] >= needed:
            return needed
    return 0 if seen is None else min(needed, seen.shape[0])


def _fit_scaler(scaler_cls, imputed_chunks, n: int, p: int):
    """The scaler fitted in one pass (partial_fit), or for RobustScaler from exact order statistics."""
    if scaler_cls is None:
        return None
    if scaler_cls is RobustScaler:
        return _robust_scaler(imputed_chunks, p)
    scaler = scaler_cls()
    for block in imputed_chunks():
        scaler.partial_fit(block)
    return scaler


def _robust_scaler(imputed_chunks, p: int) -> RobustScaler:
    """RobustScaler's centre (median) and scale (interquartile range, 1 where ~0) from exact order statistics."""
    chunks = lambda: ((block, None) for block in imputed_chunks())       # noqa: E731
    counts, lows, highs = order_stats.counts_and_ranges(chunks, 1, p)
    wanted = []
    for j in range(p):
        m = int(counts[0, j])
        wanted += [(0, j, r) for r in order_stats.median_ranks(m)]
        for share in (0.25, 0.75):
            a, b, _ = order_stats.quantile_ranks(m, share)
            wanted += [(0, j, a), (0, j, b)]
    found = order_stats.order_statistics(chunks, wanted, counts=counts, lows=lows, highs=highs)
    centre = np.array([order_stats.median_from(found, 0, j, int(counts[0, j])) for j in range(p)])
    iqr = np.array([order_stats.quantile_from(found, 0, j, int(counts[0, j]), 0.75)
                    - order_stats.quantile_from(found, 0, j, int(counts[0, j]), 0.25) for j in range(p)])
    # RobustScaler's rule for a zero scale (sklearn.preprocessing._data._handle_zeros_in_scale).
    iqr = np.where(iqr < 10 * np.finfo(np.float64).eps, 1.0, iqr)
    scaler = RobustScaler().fit(np.vstack([centre - 1.0, centre, centre + 1.0]))
    scaler.center_, scaler.scale_ = centre, iqr
    return scaler


def _pca_count(components: int | float, ratios: np.ndarray) -> int:
    if isinstance(components, int):
        return components
    # PCA's rule for a variance share (sklearn.decomposition.PCA._fit_full).
    return int(min(np.searchsorted(np.cumsum(ratios), components, side="right") + 1, ratios.size))


def _incremental_pca(blocks, n_keep: int, p: int) -> tuple[IncrementalPCA, np.ndarray]:
    """IncrementalPCA over ``blocks`` with every component (min(n, p)); returns it and all eigenvalues."""
    model = IncrementalPCA(n_components=n_keep)
    for block in blocks:
        model.partial_fit(block)
    return model, model.explained_variance_.copy()


def _truncate(model: IncrementalPCA, m: int) -> IncrementalPCA:
    eigenvalues = model.explained_variance_
    model.noise_variance_ = float(eigenvalues[m:].mean()) if eigenvalues.size > m else 0.0
    model.components_ = model.components_[:m].copy()
    model.explained_variance_ = eigenvalues[:m].copy()
    model.explained_variance_ratio_ = model.explained_variance_ratio_[:m].copy()
    model.singular_values_ = model.singular_values_[:m].copy()
    model.n_components_ = m
    model.n_components = m
    return model


def _fit_pca(source: MatrixFile, scaled_of, components, n: int, p: int, *, seed: int):
    keep = min(n, p)
    model, eigenvalues = _incremental_pca((scaled_of(block) for _, block in source.chunks(min_rows=keep)), keep, p)
    return _truncate(model, _pca_count(components, model.explained_variance_ratio_)), eigenvalues


def _residual(scaled: np.ndarray, pca) -> np.ndarray:
    centred = scaled - pca.mean_
    return np.linalg.norm(centred - (centred @ pca.components_.T) @ pca.components_, axis=1)


def _write_space(source: MatrixFile, scaled_of, pca, path: Path, d: int) -> MatrixFile:
    with open(path, "wb") as handle:
        for _, block in source.chunks():
            scaled = scaled_of(block)
            space = scaled if pca is None else pca.transform(scaled)
            np.ascontiguousarray(space, dtype=np.float64).tofile(handle)
    return MatrixFile(path, source.n_rows, d, tuple(range(d)))


def _sample_rows(n: int, size: int, seed: int) -> np.ndarray:
    if n <= size:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).choice(n, size=size, replace=False))


def _gather(source: MatrixFile, row_sets: list[np.ndarray]) -> list[np.ndarray]:
    """The rows of each sorted index array, in one pass."""
    parts: list[list[np.ndarray]] = [[] for _ in row_sets]
    for start, block in source.chunks():
        stop = start + block.shape[0]
        for i, rows in enumerate(row_sets):
            a, b = np.searchsorted(rows, [start, stop])
            if b > a:
                parts[i].append(block[rows[a:b] - start])
    width = source.shape[1]
    return [np.vstack(found) if found else np.empty((0, width)) for found in parts]


def _cluster(space_file: MatrixFile, sample: np.ndarray, k: int, config: FitConfig, report) -> tuple:
    """MiniBatchKMeans (n_init inits on the sample, one epoch over every chunk), then full-data Lloyd passes;
    returns the model (its centres replaced by the refined ones), the centres and the exact inertia."""
    model = MiniBatchKMeans(n_clusters=k, n_init=config.n_init, random_state=config.seed, batch_size=MINI_BATCH,
                            init_size=min(sample.shape[0], max(3 * MINI_BATCH, 3 * k)))
    model.fit(sample)
    for _, block in space_file.chunks(min_rows=k):
        for at in range(0, block.shape[0], MINI_BATCH * 4):
            part = block[at:at + MINI_BATCH * 4]
            if part.shape[0] >= k:
                model.partial_fit(part)
    report(0.3)
    centres = model.cluster_centers_.copy()
    for i in range(LLOYD_PASSES):
        sums, counts, _ = _lloyd_sums(space_file, centres)
        moved = counts > 0
        centres[moved] = sums[moved] / counts[moved, None]
        report(0.3 + 0.5 * (i + 1) / LLOYD_PASSES)
    _, _, inertia = _lloyd_sums(space_file, centres)
    model.cluster_centers_ = centres
    model.inertia_ = inertia
    report(1.0)
    return model, centres, inertia


def _lloyd_sums(space_file: MatrixFile, centres: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Member sums and counts of each centre's nearest rows, and the inertia, in one pass."""
    k, d = centres.shape
    sums, counts, inertia = np.zeros((k, d)), np.zeros(k), 0.0
    for _, block in space_file.chunks():
        nearest = _nearest(block, centres)
        diff = block - centres[nearest]
        inertia += float(np.einsum("ij,ij->", diff, diff))
        counts += np.bincount(nearest, minlength=k)
        for c in range(d):
            sums[:, c] += np.bincount(nearest, weights=block[:, c], minlength=k)
    return sums, counts, inertia


# --------------------------------------------------------------------------- held-out calibration
class _FoldModel:
    def __init__(self, medians, scaler, pca):
        self.medians, self.scaler, self.pca = medians, scaler, pca
        self.centroids: np.ndarray | None = None

    def scaled(self, block):
        imputed = np.where(np.isnan(block), self.medians, block)
        return imputed if self.scaler is None else self.scaler.transform(imputed)

    def space(self, scaled):
        return scaled if self.pca is None else self.pca.transform(scaled)


def _calibrate(source: MatrixFile, config: FitConfig, *, segments, labels, raw_centroids, in_sample_distance,
               in_sample_residual, has_residual, n_components, moments: ColumnMoments, medians) -> Calibration:
    """``service.core.calibration.calibrate`` with each fold's steps fitted in streaming passes."""
    n, p = source.shape
    k = raw_centroids.shape[0]
    q = config.outlier_quantile
    if n < MIN_CROSS_FIT_ROWS:
        d_scale = segment_medians(in_sample_distance, segments, k)[segments]
        r_scale = segment_medians(in_sample_residual, segments, k)[segments]
        return calibrate_scores(in_sample_distance.copy(), in_sample_residual.copy(), d_scale, r_scale,
                                segments=segments, k=k, in_sample_distance=in_sample_distance,
                                in_sample_residual=in_sample_residual, has_residual=has_residual, q=q, held_out=False)
    from service.core.calibration import N_FOLDS
    fold = _folds(segments, config.seed)
    scaler_cls = SCALERS[config.scaling]
    models: list[_FoldModel] = []
    for f in range(N_FOLDS):
        train = fold != f
        # A column without missing values never uses its median: only the others need the fold's own.
        fold_medians = medians.copy()
        if (moments.missing > 0).any():
            own = _medians(source, moments, groups=train.astype(np.intp), group=1)
            fold_medians = np.where(moments.missing > 0, own, medians)
        scaler = _fit_scaler(scaler_cls, _imputed_chunks(source, fold_medians, rows=train), int(train.sum()), p)
        models.append(_FoldModel(fold_medians, scaler, None))
    if n_components is not None:
        for f, model in enumerate(models):
            train = fold != f
            keep = min(int(train.sum()), p)
            blocks = (model.scaled(block)[train[start:start + block.shape[0]]]
                      for start, block in source.chunks(min_rows=max(keep, 1) * N_FOLDS))
            pca, _ = _incremental_pca(blocks, keep, p)
            model.pca = _truncate(pca, min(n_components, keep))
    # Start centroids: the member means of the final labels among the fold's training rows (the final centroid
    # for a segment with none there); then Lloyd passes over the training rows.
    for f, model in enumerate(models):
        fallback = raw_centroids if model.scaler is None else model.scaler.transform(raw_centroids)
        model.centroids = model.space(fallback)
    passes = 1 + (FOLD_LLOYD_PASSES if config.method == "kmeans" and k > 1 else 0)
    for i in range(passes):
        d = models[0].centroids.shape[1]
        sums = [np.zeros((k, d)) for _ in models]
        counts = [np.zeros(k) for _ in models]
        for start, block in source.chunks():
            stop = start + block.shape[0]
            for f, model in enumerate(models):
                train = fold[start:stop] != f
                if not train.any():
                    continue
                space = model.space(model.scaled(block[train]))
                members = labels[start:stop][train] if i == 0 else _nearest(space, model.centroids)
                counts[f] += np.bincount(members, minlength=k)
                for c in range(d):
                    sums[f][:, c] += np.bincount(members, weights=space[:, c], minlength=k)
        for f, model in enumerate(models):
            moved = counts[f] > 0
            model.centroids[moved] = sums[f][moved] / counts[f][moved, None]
    distance, residual = np.empty(n), np.empty(n)
    d_scale, r_scale = np.empty(n), np.empty(n)
    fold_distance = [np.empty(n) for _ in models]
    fold_residual = [np.zeros(n) for _ in models]
    for start, block in source.chunks():
        stop = start + block.shape[0]
        for f, model in enumerate(models):
            scaled = model.scaled(block)
            space = model.space(scaled)
            fold_distance[f][start:stop] = np.linalg.norm(space - model.centroids[segments[start:stop]], axis=1)
            if model.pca is not None and model.pca.n_components_ < p:
                fold_residual[f][start:stop] = _residual(scaled, model.pca)
    for f in range(len(models)):
        train, test = fold != f, fold == f
        distance[test], residual[test] = fold_distance[f][test], fold_residual[f][test]
        d_scale[test] = segment_medians(fold_distance[f][train], segments[train], k)[segments[test]]
        r_scale[test] = segment_medians(fold_residual[f][train], segments[train], k)[segments[test]]
    del fold_distance, fold_residual
    return calibrate_scores(distance, residual, d_scale, r_scale, segments=segments, k=k,
                            in_sample_distance=in_sample_distance, in_sample_residual=in_sample_residual,
                            has_residual=has_residual, q=q, held_out=True)


# --------------------------------------------------------------------------- drift reference and profiles
def _reference_profile(source: MatrixFile, moments: ColumnMoments, nearest, k, calibration: Calibration,
                       sample_rows) -> ReferenceProfile:
    n, p = source.shape
    distinct: list[np.ndarray | None] = [np.empty(0) for _ in range(p)]
    for _, block in source.chunks():
        for j in range(p):
            if distinct[j] is None:
                continue
            column = block[:, j]
            merged = np.union1d(distinct[j], column[~np.isnan(column)])
            distinct[j] = merged if merged.size <= MAX_CATEGORIES else None
    quantile_columns = [j for j in range(p) if distinct[j] is None]
    edges: dict[int, np.ndarray] = {}
    if quantile_columns:
        counts, lows, highs = moments.count[None, :], moments.low[None, :], moments.high[None, :]
        wanted = []
        for j in quantile_columns:
            for share in DECILES:
                a, b, _ = order_stats.quantile_ranks(int(counts[0, j]), float(share))
                wanted += [(0, j, a), (0, j, b)]
        found = order_stats.order_statistics(_plain_chunks(source), wanted, counts=counts, lows=lows, highs=highs)
        for j in quantile_columns:
            edges[j] = np.unique([order_stats.quantile_from(found, 0, j, int(counts[0, j]), float(share))
                                  for share in DECILES])
    kinds = ["quantiles" if distinct[j] is None else "categories" for j in range(p)]
    bin_edges = [edges[j] if distinct[j] is None else distinct[j] for j in range(p)]
    bin_counts = [np.zeros(edges[j].size + 1 if distinct[j] is None else distinct[j].size + 1, dtype=np.int64)
                  for j in range(p)]
    sample_parts = []
    for start, block in source.chunks():
        stop = start + block.shape[0]
        for j in range(p):
            column = block[:, j]
            column = column[~np.isnan(column)]
            side = "left"
            index = np.searchsorted(bin_edges[j], column, side=side)
            bin_counts[j] += np.bincount(index, minlength=bin_counts[j].size)[:bin_counts[j].size]
        a, b = np.searchsorted(sample_rows, [start, stop])
        if b > a:
            sample_parts.append(block[sample_rows[a:b] - start])
    return ReferenceProfile(
        n_records=n,
        bin_kinds=kinds,
        bin_edges=bin_edges,
        bin_counts=bin_counts,
        means=np.where(moments.count > 0, moments.mean, np.nan),
        stds=moments.std,
        missing_share=moments.missing / n,
        missing_count=moments.missing.copy(),
        sample=np.vstack(sample_parts) if sample_parts else np.empty((0, p)),
        segment_counts=np.bincount(nearest, minlength=k),
        outlier_count=int(calibration.flagged.sum()),
        outlier_rate=float(calibration.flagged.mean()),
        residual_sample=calibration.residuals[sample_rows].copy(),
        residual_median=float(np.median(calibration.residuals)),
    )


def _finite(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _describe_segments(source: MatrixFile, moments: ColumnMoments, labels, back, calibration: Calibration, k: int,
                       features: list[str]) -> list[dict[str, Any]]:
    """``service.core.fit._describe_segments`` from streamed per-segment sums (shifted by the overall mean, so
    that the variance does not cancel) and exact per-segment medians."""
    n, p = source.shape
    shift = np.where(moments.count > 0, moments.mean, 0.0)
    count = np.zeros((k, p))
    s1, s2 = np.zeros((k, p)), np.zeros((k, p))
    for start, block in source.chunks():
        group = labels[start:start + block.shape[0]]
        for j in range(p):
            column = block[:, j] - shift[j]
            observed = ~np.isnan(column)
            g, x = group[observed], column[observed]
            count[:, j] += np.bincount(g, minlength=k)
            s1[:, j] += np.bincount(g, weights=x, minlength=k)
            s2[:, j] += np.bincount(g, weights=x * x, minlength=k)
    with np.errstate(invalid="ignore", divide="ignore"):
        offset = s1 / count
        means = shift + offset
        stds = np.sqrt(np.maximum(s2 / count - offset ** 2, 0.0))
    chunks = _plain_chunks(source, labels)
    counts, lows, highs = order_stats.counts_and_ranges(chunks, k, p)
    wanted = [(c, j, r) for c in range(k) for j in range(p) if counts[c, j] > 0
              for r in order_stats.median_ranks(int(counts[c, j]))]
    found = order_stats.order_statistics(chunks, wanted, counts=counts, lows=lows, highs=highs)
    overall_mean, overall_std = moments.mean, moments.std
    sizes = np.bincount(labels, minlength=k)
    segments = []
    for c in range(k):
        profile = {}
        for j, name in enumerate(features):
            has = counts[c, j] > 0
            mean = means[c, j] if has else np.nan
            median = order_stats.median_from(found, c, j, int(counts[c, j])) if has else np.nan
            with np.errstate(invalid="ignore", divide="ignore"):
                z = (mean - overall_mean[j]) / overall_std[j]
            profile[name] = {"mean": _finite(mean), "median": _finite(median),
                             "std": _finite(stds[c, j] if has else np.nan), "z": _finite(z)}
        segments.append({
            "id": c,
            "label": None,
            "size": int(sizes[c]),
            "share": float(sizes[c] / n),
            "clusterer_size": int(sizes[c]),
            "distance_threshold": float(calibration.distance_thresholds[c]),
            "residual_threshold": float(calibration.residual_thresholds[c]),
            "threshold_source": "pooled" if calibration.borrowed[c] else "own",
            "held_out_flag_rate": float(calibration.flagged[labels == c].mean()) if sizes[c] else 0.0,
            "centroid": {name: float(back[c, j]) for j, name in enumerate(features)},
            "profile": profile,
        })
    return segments
