"""Fit a bundle: median imputation -> scaling -> PCA -> clustering, then describe the segments.

``fit_bundle`` checks its inputs once and raises ``InvalidInput`` naming the field; the helpers
after it trust their arguments.
"""

from __future__ import annotations

import hashlib
from typing import Any, Callable

import numpy as np
import pandas as pd
from scipy.stats import norm
from sklearn.cluster import AgglomerativeClustering, KMeans
from sklearn.decomposition import PCA
from sklearn.impute import SimpleImputer
from sklearn.metrics import silhouette_score
from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler

from service.core.bundle import Bundle, FitConfig, ReferenceProfile
from service.core.calibration import Calibration, calibrate
from service.core.frame import MAX_ABS_VALUE
from service.core.report import fit_report, kneedle_k  # noqa: F401 - kneedle_k is imported from here too
from service.errors import InvalidInput, RecordProblem

SCALERS = {"standard": StandardScaler, "robust": RobustScaler, "minmax": MinMaxScaler, "none": None}
METHODS = ("kmeans", "agglomerative")
LINKAGES = ("complete", "average", "single", "ward")
SELECTIONS = ("elbow", "silhouette")
DECILES = np.linspace(0.1, 0.9, 9)
# A feature with at most this many distinct training values is binned by value (drift), not by quantile.
MAX_CATEGORIES = 20


# A feature whose population standard deviation is at most NEAR_CONSTANT_RTOL times its largest magnitude is
# treated as constant. float64 carries ~16 significant digits (eps = 2.2e-16); the mean of a million values
# summed one by one can be off by up to 1e6 * eps = 2.2e-10 of the scale, so a spread below ~1e-9 of the scale
# cannot be told from rounding, and scaling by it would turn rounding noise into whole standard deviations
# (every new record an outlier). No customer measurement varies in its tenth significant digit only.
NEAR_CONSTANT_RTOL = 1e-9
# A feature whose spread is below this cannot be computed with: its variance (spread squared) leaves float64's
# normal range (~2.2e-308) and scaling turns it into zeros or NaN. Such a column must be rescaled (other units).
MIN_SPREAD = 1e-100
# Segments smaller than this share of the training records (or than TINY_SEGMENT_SIZE records) get a warning.
TINY_SEGMENT_SHARE = 0.01
TINY_SEGMENT_SIZE = 5
# Rows looked at first when counting distinct rows (enough, almost always, to show there are at least k).
_DISTINCT_PROBE_ROWS = 4096


def unusable_features(values: np.ndarray, features: list[str]) -> dict[str, str]:
    """{feature: why} for columns the fit cannot use: every value missing, (near-)constant, or of a magnitude
    whose arithmetic leaves float64's range.

    Near-constant: population std <= NEAR_CONSTANT_RTOL * max |x| over the observed values. Magnitude: a value
    beyond MAX_ABS_VALUE (the input limit, checked here again because the core trusts no caller), or a spread
    below MIN_SPREAD.
    """
    reasons: dict[str, str] = {}
    observed = ~np.isnan(values)
    for j, name in enumerate(features):
        column = values[observed[:, j], j]
        if column.size == 0:
            reasons[name] = "every value is missing"
            continue
        why = feature_unusable_because(float(np.max(np.abs(column))), float(np.std(column)), np.ptp(column) == 0)
        if why is not None:
            reasons[name] = why
    return reasons


def feature_unusable_because(scale: float, spread: float, constant: bool) -> str | None:
    """Why a feature with observed values cannot be used (see ``unusable_features``), from its largest |value|,
    its population std and whether all its values are equal; None when it can."""
    if scale > MAX_ABS_VALUE:
        return f"a value exceeds the limit |x| <= {MAX_ABS_VALUE:g}; its squares would overflow float64"
    if 0 < spread < MIN_SPREAD and spread > NEAR_CONSTANT_RTOL * scale:
        return (f"its spread (std) is below {MIN_SPREAD:g}, too small to compute with in float64; "
                "express it in other units")
    if spread <= NEAR_CONSTANT_RTOL * scale:
        # No value is quoted: error bodies and reports carry no record values.
        return ("constant" if constant else f"near-constant (std at most {NEAR_CONSTANT_RTOL:g} x its largest "
                "|value|)") + ": no information to cluster on"
    return None


def distinct_rows_at_least(values: np.ndarray, needed: int) -> int:
    """min(needed, number of distinct rows after median imputation): cheap when there are plenty."""
    medians = np.nanmedian(values, axis=0) if np.isnan(values).any() else None

    def filled(rows: np.ndarray) -> np.ndarray:
        return rows if medians is None else np.where(np.isnan(rows), medians, rows)
    probe = filled(values[:_DISTINCT_PROBE_ROWS])
    count = np.unique(probe, axis=0).shape[0]
    if count >= needed or values.shape[0] <= _DISTINCT_PROBE_ROWS:
        return min(count, needed)
    return min(needed, np.unique(filled(values), axis=0).shape[0])


# --------------------------------------------------------------------------- checks at the door
def check_fit_inputs(values: np.ndarray, config: FitConfig, *, max_agglomerative_rows: int) -> None:
    """Raise InvalidInput for anything that would make the fit meaningless or fail inside sklearn."""
    check_fit_facts(values.shape, config, max_agglomerative_rows=max_agglomerative_rows,
                    unusable=lambda: unusable_features(values, list(config.features)),
                    distinct_at_least=lambda needed: distinct_rows_at_least(values, needed))


def check_fit_facts(shape: tuple[int, int], config: FitConfig, *, max_agglomerative_rows: int,
                    unusable: Callable[[], dict[str, str]], distinct_at_least: Callable[[int], int]) -> None:
    """``check_fit_inputs`` on facts about the data rather than the data (the out-of-core engine computes them in
    streaming passes): its shape, the unusable features, and the distinct rows (asked only when needed)."""
    n_records, n_features = shape
    problems: list[RecordProblem] = []
    if config.scaling not in SCALERS:
        problems.append(RecordProblem(None, "scaling", f"must be one of {list(SCALERS)}, got {config.scaling!r}"))
    if config.method not in METHODS:
        problems.append(RecordProblem(None, "method", f"must be one of {list(METHODS)}, got {config.method!r}"))
    if config.linkage not in LINKAGES:
        problems.append(RecordProblem(None, "linkage", f"must be one of {list(LINKAGES)}, got {config.linkage!r}"))
    if config.selection not in SELECTIONS:
        problems.append(RecordProblem(None, "selection", f"must be one of {list(SELECTIONS)}, got {config.selection!r}"))
    if n_features == 0:
        problems.append(RecordProblem(None, "features", "no numeric feature columns to fit on"))
    if n_records < 2:
        problems.append(RecordProblem(None, "records", f"need at least 2 records, got {n_records}"))
    if problems:
        raise InvalidInput(problems)

    for name, why in unusable().items():
        problems.append(RecordProblem(None, name, f"feature cannot be used: {why}; remove it from 'features' "
                                      "(without 'features', such columns are dropped and listed in 'warnings')"))

    if not 1 <= config.k_min <= config.k_max:
        problems.append(RecordProblem(None, "k", f"need 1 <= min <= max, got min={config.k_min}, max={config.k_max}"))
    elif config.k_max > n_records - 1 and not (config.k_fixed and config.k_min == 1):
        problems.append(RecordProblem(
            None, "k", f"k must lie in [1, n_records - 1] = [1, {n_records - 1}]; got max {config.k_max}"))
    if not problems and config.k_max > 1:
        distinct = distinct_at_least(config.k_max)
        if distinct < config.k_max:
            problems.append(RecordProblem(
                None, "k", f"k (max {config.k_max}) exceeds the {distinct} distinct records (after imputing "
                "missing values with the medians); a segment needs a point of its own"))
    if config.selection == "silhouette" and not config.k_fixed and config.k_max < 2:
        problems.append(RecordProblem(None, "k", "silhouette selection needs a range reaching k >= 2"))

    components = config.components
    if components is not None:
        if isinstance(components, bool):
            problems.append(RecordProblem(None, "components", "must be an int, a float in (0, 1), or null"))
        elif isinstance(components, int):
            limit = min(n_features, n_records)
            if not 1 <= components <= limit:
                problems.append(RecordProblem(
                    None, "components",
                    f"must lie in [1, min(n_features, n_records)] = [1, {limit}]; got {components}"))
        elif not 0.0 < components < 1.0:
            problems.append(RecordProblem(None, "components", f"a variance share must lie in (0, 1); got {components}"))

    if not 0.5 <= config.outlier_quantile < 1.0:
        problems.append(RecordProblem(None, "outlier_quantile", f"must lie in [0.5, 1); got {config.outlier_quantile}"))
    if config.n_init < 1:
        problems.append(RecordProblem(None, "n_init", f"must be >= 1; got {config.n_init}"))
    if config.method == "agglomerative" and n_records > max_agglomerative_rows:
        problems.append(RecordProblem(
            None, "method",
            f"agglomerative clustering needs O(n^2) memory; at most {max_agglomerative_rows} records "
            f"(got {n_records}); use kmeans for larger data"))
    if problems:
        raise InvalidInput(problems)


# --------------------------------------------------------------------------- k selection
def elbow_k(ks: list[int], distortions: list[float]) -> int:
    """Point of the (k, distortion) curve nearest the origin after scaling both axes to [0, 1]."""
    k = np.asarray(ks, dtype=float)
    d = np.asarray(distortions, dtype=float)
    if k.size == 1:
        return int(k[0])
    k_unit = (k - k.min()) / (k.max() - k.min())
    spread = d.max() - d.min()
    d_unit = (d - d.min()) / spread if spread > 0 else np.zeros_like(d)
    return int(k[np.argmin(np.hypot(k_unit, d_unit))])


def _cluster(space: np.ndarray, k: int, config: FitConfig) -> tuple[Any, np.ndarray, np.ndarray]:
    """Fit one clusterer; return it, its labels and the centroids (member means for agglomerative)."""
    if config.method == "kmeans":
        model = KMeans(n_clusters=k, n_init=config.n_init, random_state=config.seed).fit(space)
        return model, model.labels_, model.cluster_centers_
    if k == 1:
        labels = np.zeros(space.shape[0], dtype=np.intp)
        model = None
    else:
        model = AgglomerativeClustering(n_clusters=k, linkage=config.linkage).fit(space)
        labels = model.labels_
    centroids = np.vstack([space[labels == c].mean(axis=0) for c in range(k)])
    return model, labels, centroids


def _silhouette(space: np.ndarray, labels: np.ndarray, config: FitConfig) -> float | None:
    n_labels = np.unique(labels).size
    if not 2 <= n_labels <= space.shape[0] - 1:
        return None
    sample = config.silhouette_sample if space.shape[0] > config.silhouette_sample else None
    try:
        return float(silhouette_score(space, labels, sample_size=sample, random_state=config.seed))
    except ValueError:
        # The seeded sample can miss a tiny segment (say, one far outlier) and hold a single label;
        # the silhouette of that sample is undefined.
        if sample is None:
            raise
        return None


def _squared_distances(space: np.ndarray, centroids: np.ndarray) -> np.ndarray:
    """(n, k) squared Euclidean distances, computed directly (exact, no expansion)."""
    return ((space[:, None, :] - centroids[None, :, :]) ** 2).sum(axis=2)


def _own_sq_distances(space: np.ndarray, centroids: np.ndarray, labels: np.ndarray) -> np.ndarray:
    diff = space - centroids[labels]
    return np.einsum("ij,ij->i", diff, diff)


def _nearest(space: np.ndarray, centroids: np.ndarray, chunk: int = 8192) -> np.ndarray:
    out = np.empty(space.shape[0], dtype=np.intp)
    for start in range(0, space.shape[0], chunk):
        out[start:start + chunk] = _squared_distances(space[start:start + chunk], centroids).argmin(axis=1)
    return out


# --------------------------------------------------------------------------- residual limit
def jackson_mudholkar_limit(discarded_eigenvalues: np.ndarray, quantile: float) -> float:
    """Upper ``quantile`` limit of the PCA squared residual Q (SPE).

    Jackson, J.E. & Mudholkar, G.S. (1979), Technometrics 21(3): with theta_i the sum of the
    discarded eigenvalues to the power i and h0 = 1 - 2 theta1 theta3 / (3 theta2^2),
    Q = theta1 [c sqrt(2 theta2 h0^2) / theta1 + 1 + theta2 h0 (h0 - 1) / theta1^2]^(1/h0),
    c the standard normal quantile. Returned as sqrt(Q): the same units as the residual distance.

    The formula rests on (Q / theta1)^h0 being roughly normal. h0 <= 1/3 always, and it turns
    negative when one discarded eigenvalue dominates many small ones; x^h0 then decreases, so the upper
    quantile of Q comes from the lower normal quantile: the c term takes the sign of h0 (with h0 > 0
    this is the formula above unchanged). Near h0 = 0 the log-normal limit of the same approximation
    is used.
    """
    lam = np.asarray(discarded_eigenvalues, dtype=float)
    lam = lam[lam > 0]
    if lam.size == 0:
        return 0.0
    # Q scales linearly with the eigenvalues (h0 is scale-free; theta_i scales as s^i): compute on eigenvalues
    # divided by the largest, where theta_2^2 cannot underflow nor theta_3 overflow, and scale back at the end.
    unit = float(lam.max())
    lam = lam / unit
    t1, t2, t3 = (float(np.sum(lam ** i)) for i in (1, 2, 3))
    h0 = 1.0 - 2.0 * t1 * t3 / (3.0 * t2 ** 2)
    c = float(norm.ppf(quantile))
    if abs(h0) < 1e-6:
        return float(np.sqrt(unit) * np.sqrt(t1 * np.exp(c * np.sqrt(2.0 * t2) / t1 - t2 / t1 ** 2)))
    base = c * h0 * np.sqrt(2.0 * t2) / t1 + 1.0 + t2 * h0 * (h0 - 1.0) / t1 ** 2
    return float(np.sqrt(unit) * np.sqrt(t1 * base ** (1.0 / h0)))


# --------------------------------------------------------------------------- the fit
def data_sha256(values: np.ndarray) -> str:
    """SHA-256 of the training matrix: float64, C order, NaN for missing, shape prefixed."""
    digest = hashlib.sha256(f"{values.shape[0]}x{values.shape[1]}:".encode())
    digest.update(np.ascontiguousarray(values, dtype=np.float64).tobytes())
    return digest.hexdigest()


# ``data_sha256`` of a version fitted on a cluster, whose rows are never in one place: SHA-256 cannot be
# continued across machines (a hash's state cannot be sent), so the matrix is hashed in chunks of this many
# consecutive rows, wherever they lie, and the chunks' digests are hashed in order. The value starts with
# CHUNKED_DIGEST_PREFIX so that it is never taken for (or compared with) a whole-matrix ``data_sha256``.
DIGEST_CHUNK_ROWS = 65_536
CHUNKED_DIGEST_PREFIX = "chunks:"


def chunk_digest(*pieces: np.ndarray) -> bytes:
    """SHA-256 of consecutive row blocks (one chunk of ``data_chunks_sha256``, maybe split over blocks)."""
    digest = hashlib.sha256()
    for piece in pieces:
        digest.update(np.ascontiguousarray(piece, dtype=np.float64).tobytes())
    return digest.digest()


def combine_chunk_digests(n_rows: int, n_columns: int, digests: list[bytes], chunk_rows: int = DIGEST_CHUNK_ROWS
                          ) -> str:
    digest = hashlib.sha256(f"{n_rows}x{n_columns}:{chunk_rows}-row chunks:".encode())
    for part in digests:
        digest.update(part)
    return CHUNKED_DIGEST_PREFIX + digest.hexdigest()


def data_chunks_sha256(values: np.ndarray, chunk_rows: int = DIGEST_CHUNK_ROWS) -> str:
    """The chunked digest of a matrix in memory: "chunks:" + SHA-256 over "<rows>x<cols>:65536-row chunks:" and
    the SHA-256 of each run of 65,536 consecutive rows (the last one shorter), float64, C order, in order."""
    return combine_chunk_digests(values.shape[0], values.shape[1],
                                 [chunk_digest(values[start:start + chunk_rows])
                                  for start in range(0, values.shape[0], chunk_rows)], chunk_rows)


# Where each step of a fit starts on the 0..1 progress scale. Clustering (one fit per candidate k) is most of the
# work and shares its span evenly between the candidates; 'saving' (the store write, done by the caller) comes
# last, and 1 is left for "done".
STEP_START = {"reading": 0.0, "scaling": 0.05, "reducing": 0.1, "clustering": 0.2, "profiling": 0.85,
              "saving": 0.95}

Progress = Callable[[str, float], None]


def _no_progress(step: str, fraction: float) -> None:
    return None


def choose_k(curve: list[dict[str, Any]], config: FitConfig) -> tuple[int, str]:
    """The k a fit keeps from its curve (rows with ``k``, ``distortion``, ``silhouette``), and how it was chosen:
    the fixed k, the elbow of the distortion curve, or the best silhouette (the smaller k on a tie). Every
    engine chooses by this one rule."""
    if config.k_fixed:
        return config.k_min, "fixed"
    if config.selection == "elbow":
        return elbow_k([row["k"] for row in curve], [row["distortion"] for row in curve]), "elbow"
    scored = [(row["silhouette"], -row["k"]) for row in curve if row["silhouette"] is not None]
    if not scored:
        raise InvalidInput(
            f"the silhouette is undefined for every k in [{config.k_min}, {config.k_max}] (each clustering, or its "
            "seeded sample, has a single segment); use selection 'elbow' or another k range", field="selection")
    return -max(scored)[1], "silhouette"


def fit_bundle(values: np.ndarray, config: FitConfig, *, max_agglomerative_rows: int = 20_000,
               progress: Progress | None = None) -> Bundle:
    """Fit the whole bundle on ``values`` (n_records, n_features), NaN = missing.

    ``progress(step, fraction)``, when given, is called as each step starts: 'scaling', 'reducing',
    'clustering k=N' (once per candidate k), 'profiling'; ``fraction`` (0..1, never decreasing) is the share of
    the whole fit done before that step (``STEP_START``)."""
    report_step = progress or _no_progress
    check_fit_inputs(values, config, max_agglomerative_rows=max_agglomerative_rows)
    report_step("scaling", STEP_START["scaling"])
    n_records, n_features = values.shape
    q = config.outlier_quantile

    imputer = SimpleImputer(strategy="median").fit(values)
    imputed = imputer.transform(values)
    scaler_cls = SCALERS[config.scaling]
    scaler = scaler_cls().fit(imputed) if scaler_cls is not None else None
    scaled = imputed if scaler is None else scaler.transform(imputed)

    pca = None
    space = scaled
    report_step("reducing", STEP_START["reducing"])
    if config.components is not None:
        pca = PCA(n_components=config.components, svd_solver="full", random_state=config.seed).fit(scaled)
        space = pca.transform(scaled)

    # Search k; keep the clusterer of the chosen k.
    ks = list(range(config.k_min, config.k_max + 1))
    curve: list[dict[str, Any]] = []
    fitted: dict[int, tuple[Any, np.ndarray, np.ndarray]] = {}
    clustering_span = STEP_START["profiling"] - STEP_START["clustering"]
    for i, k in enumerate(ks):
        report_step(f"clustering k={k}", STEP_START["clustering"] + clustering_span * i / len(ks))
        model, labels, centroids = _cluster(space, k, config)
        inertia = float(_own_sq_distances(space, centroids, labels).sum())
        curve.append({"k": k, "distortion": inertia / n_records, "inertia": inertia,
                      "silhouette": _silhouette(space, labels, config)})
        fitted[k] = (model, labels, centroids)
    chosen, method = choose_k(curve, config)
    clusterer, labels, centroids = fitted[chosen]
    del fitted
    report_step("profiling", STEP_START["profiling"])

    # One truth for sizes: the assign rule (nearest centroid in the clustering space) applied to the training
    # rows gives the report's sizes and shares, the segments the thresholds are calibrated on, and the drift
    # baseline. The clusterer's own sizes are reported beside them (equal for k-means up to rare ties).
    nearest = _nearest(space, centroids)
    distances = np.sqrt(_own_sq_distances(space, centroids, nearest))
    has_residual = pca is not None and pca.n_components_ < n_features
    residuals = np.zeros(n_records)
    residual_limit = 0.0
    if has_residual:
        centred = scaled - pca.mean_
        residuals = np.linalg.norm(centred - (centred @ pca.components_.T) @ pca.components_, axis=1)
        # All eigenvalues of the scaled data's covariance (ddof=1, as PCA.explained_variance_).
        eigenvalues = np.linalg.svd(centred, compute_uv=False) ** 2 / (n_records - 1)
        residual_limit = jackson_mudholkar_limit(eigenvalues[pca.n_components_:], q)
    raw_centroids = _centroids_in_raw_units(centroids, scaler, pca)
    calibration = calibrate(
        values, segments=nearest, labels=labels, raw_centroids=raw_centroids, in_sample_distance=distances,
        in_sample_residual=residuals, has_residual=has_residual, scaler_cls=scaler_cls,
        n_components=None if pca is None else int(pca.n_components_), method=config.method, q=q, seed=config.seed)
    residual_threshold = calibration.pooled_residual_threshold

    rng = np.random.default_rng(config.seed)
    sample_rows = np.sort(rng.choice(n_records, size=min(n_records, config.reference_sample), replace=False))
    reference = _reference_profile(values, nearest, chosen, calibration, sample_rows)

    fit_warnings = _fit_warnings(config, labels, nearest, chosen, n_records)
    inertia = float(_own_sq_distances(space, centroids, labels).sum())
    # Where the fit ran: "memory" (service.engines.dask_engine writes "dask" and its cluster's details).
    report = fit_report(
        config, n_records=n_records, pca=pca, imputer=imputer, curve=curve, chosen=chosen, method=method,
        inertia=inertia, segments=_describe_segments(values, labels, nearest, raw_centroids, calibration, chosen, config),
        centroid_agreement=float(np.mean(nearest == labels)), residual_threshold=residual_threshold,
        residual_limit=residual_limit, reference=reference, calibration=calibration.as_report(q),
        data_sha256=data_sha256(values), warnings=fit_warnings, engine="memory")
    return Bundle(
        features=list(config.features),
        config=config,
        imputer=imputer,
        scaler=scaler,
        pca=pca,
        clusterer=clusterer,
        centroids=np.ascontiguousarray(centroids, dtype=np.float64),
        distance_thresholds=calibration.distance_thresholds,
        residual_thresholds=calibration.residual_thresholds,
        residual_threshold=residual_threshold,
        residual_limit_jm=residual_limit,
        reference=reference,
        report=report,
    )


def _fit_warnings(config: FitConfig, labels: np.ndarray, nearest: np.ndarray, k: int,
                  n_records: int) -> list[dict[str, Any]]:
    """Things the caller should know about an otherwise valid fit (the report's ``warnings``).

    ``labels`` are the clusterer's own (how many distinct clusters it found); ``nearest`` is the assign rule,
    which the report's segment sizes, the thresholds and the drift baseline use, so empty and tiny segments are
    judged by the same counts the report shows."""
    return fit_warnings_from_counts(config, np.bincount(labels, minlength=k), np.bincount(nearest, minlength=k),
                                    k, n_records)


def fit_warnings_from_counts(config: FitConfig, clusterer_sizes: np.ndarray, sizes: np.ndarray, k: int,
                             n_records: int) -> list[dict[str, Any]]:
    """``_fit_warnings`` from the two per-segment counts (the clusterer's, the assign rule's): what an engine
    that never holds every row's label (service.engines.dask_engine) can give."""
    found: list[dict[str, Any]] = []

    def warn(kind: str, field: str | None, message: str) -> None:
        found.append({"kind": kind, "field": field, "message": message})

    for name, why in config.dropped_features:
        warn("dropped_feature", name, f"dropped from the default features: {why}")
    distinct = int(np.count_nonzero(clusterer_sizes))
    if distinct < k:
        warn("fewer_clusters", "k", f"the clusterer found {distinct} distinct clusters, fewer than k = {k}")
    tiny = max(TINY_SEGMENT_SIZE, TINY_SEGMENT_SHARE * n_records)
    for segment, size in enumerate(np.asarray(sizes).tolist()):
        if size == 0:
            warn("empty_segment", f"segments.{segment}", f"segment {segment} has no training records")
        elif size < tiny:
            warn("tiny_segment", f"segments.{segment}",
                 f"segment {segment} has {size} training records (under {TINY_SEGMENT_SIZE} records or "
                 f"{TINY_SEGMENT_SHARE:.0%}); its threshold and profile rest on few points")
    if not config.k_fixed and config.k_max > config.k_min and k in (config.k_min, config.k_max):
        warn("k_at_range_edge", "k", f"k = {k} is at the edge of the searched range {config.k_min}-{config.k_max}; "
             "the best k may lie outside it")
    return found


def feature_bins(column: np.ndarray) -> tuple[str, np.ndarray, np.ndarray]:
    """Bins that fit one feature's observed training values: (kind, edges or categories, counts).

    At most ``MAX_CATEGORIES`` distinct values: the values themselves are the categories, plus an "other"
    bin (count 0 in training) for values never seen; otherwise the inner deciles are the edges of bins
    (e[i-1], e[i]] (duplicate edges merged), so a count feature 0-5 keeps its tail value apart.
    """
    distinct = np.unique(column)
    if distinct.size <= MAX_CATEGORIES:
        counts = np.append(np.bincount(np.searchsorted(distinct, column), minlength=distinct.size), 0)
        return "categories", distinct, counts
    inner = np.unique(np.quantile(column, DECILES))
    return "quantiles", inner, np.bincount(np.searchsorted(inner, column, side="left"), minlength=inner.size + 1)


def _reference_profile(values: np.ndarray, nearest: np.ndarray, k: int, calibration: Calibration,
                       sample_rows: np.ndarray) -> ReferenceProfile:
    kinds, edges, counts = [], [], []
    for j in range(values.shape[1]):
        column = values[:, j]
        kind, edge, count = feature_bins(column[~np.isnan(column)])
        kinds.append(kind)
        edges.append(edge)
        counts.append(count)
    missing = np.isnan(values)
    return ReferenceProfile(
        n_records=values.shape[0],
        bin_kinds=kinds,
        bin_edges=edges,
        bin_counts=counts,
        means=np.nanmean(values, axis=0),
        stds=np.nanstd(values, axis=0),
        missing_share=missing.mean(axis=0),
        missing_count=missing.sum(axis=0),
        sample=values[sample_rows].copy(),
        segment_counts=np.bincount(nearest, minlength=k),
        outlier_count=int(calibration.flagged.sum()),
        outlier_rate=float(calibration.flagged.mean()),
        residual_sample=calibration.residuals[sample_rows].copy(),
        residual_median=float(np.median(calibration.residuals)),
    )


def _centroids_in_raw_units(centroids: np.ndarray, scaler, pca) -> np.ndarray:
    """Centroids back to (imputed) original units: inverse PCA (a back-projection when components were
    dropped), then inverse scaling."""
    back = centroids if pca is None else pca.inverse_transform(centroids)
    return back if scaler is None else scaler.inverse_transform(back)


def _describe_segments(values, labels, nearest, back, calibration: Calibration, k, config) -> list[dict[str, Any]]:
    """Per segment: size and share (the assign rule), thresholds, centroid and profile in ORIGINAL units.

    The profile describes the clusterer's members (what the clustering found); ``size``/``share`` count the
    assign rule's segments, as the thresholds and the drift baseline do; ``clusterer_size`` is the
    clusterer's own count beside it.
    """
    overall_mean = np.nanmean(values, axis=0)
    overall_std = np.nanstd(values, axis=0)
    frame = pd.DataFrame(values, columns=config.features)
    grouped = frame.groupby(labels)
    means, medians = grouped.mean(), grouped.median()
    stds = grouped.std(ddof=0)
    sizes = np.bincount(nearest, minlength=k)
    clusterer_sizes = np.bincount(labels, minlength=k)
    segments = []
    for c in range(k):
        profile = {}
        for j, name in enumerate(config.features):
            mean = means.at[c, name] if c in means.index else np.nan
            profile[name] = {
                "mean": _finite(mean),
                "median": _finite(medians.at[c, name] if c in medians.index else np.nan),
                "std": _finite(stds.at[c, name] if c in stds.index else np.nan),
                "z": _finite((mean - overall_mean[j]) / overall_std[j]),
            }
        segments.append({
            "id": c,
            "label": None,
            "size": int(sizes[c]),
            "share": float(sizes[c] / values.shape[0]),
            "clusterer_size": int(clusterer_sizes[c]),
            "distance_threshold": float(calibration.distance_thresholds[c]),
            "residual_threshold": float(calibration.residual_thresholds[c]),
            "threshold_source": "pooled" if calibration.borrowed[c] else "own",
            "held_out_flag_rate": float(calibration.flagged[nearest == c].mean()) if sizes[c] else 0.0,
            "centroid": {name: float(back[c, j]) for j, name in enumerate(config.features)},
            "profile": profile,
        })
    return segments


def _finite(value: float) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None
