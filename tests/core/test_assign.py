"""The assign fast path (service.core.assign) against the stored scikit-learn objects.

Outside references, named beside each check:
- the fitted scikit-learn objects stored in the bundle: SimpleImputer.transform, the scaler's transform,
  PCA.transform / PCA.inverse_transform, KMeans.transform / KMeans.predict, and sklearn.pipeline.Pipeline.predict
  built from those same objects;
- for agglomerative bundles (no ``predict`` in scikit-learn): sklearn.neighbors.NearestCentroid fitted on
  the clusterer's labels (its centroids are the member means, as API.md defines them) and
  scipy.spatial.distance.cdist for direct Euclidean distances;
- data: Wine (UCI, via sklearn.datasets.load_wine) and Iris (Fisher 1936, via sklearn.datasets.load_iris);
  calibration data drawn with sklearn.datasets.make_blobs (seeded) and checked against the binomial
  sampling error of a quantile rule (common practice, no single source).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.datasets import load_iris, load_wine, make_blobs
from sklearn.neighbors import NearestCentroid
from sklearn.pipeline import Pipeline

import service.core.assign as core_assign
from service.core.assign import assign, compile_bundle, impute
from service.core.bundle import Bundle, FitConfig
from service.core.fit import fit_bundle

SCALINGS = ["standard", "robust", "minmax", "none"]
COMPONENTS = {"components-2": 2, "share-0.8": 0.8, "no-pca": None, "all-features": "all"}
METHODS = ["kmeans", "agglomerative"]
DATASETS = {"wine": load_wine, "iris": load_iris}
CONFIGS = [
    pytest.param(data, scaling, components, method, id=f"{data}-{scaling}-{components}-{method}")
    for data in DATASETS for scaling in SCALINGS for components in COMPONENTS for method in METHODS
]
RTOL = 1e-9


# --------------------------------------------------------------------------- shared helpers
def config_for(features, *, scaling="standard", components=0.9, method="kmeans", k=3, **extra) -> FitConfig:
    return FitConfig(features=list(features), scaling=scaling, components=components, method=method,
                     k_min=k, k_max=k, k_fixed=True, **extra)


@lru_cache(maxsize=None)
def fitted(data: str, scaling: str, components: str, method: str) -> tuple[Bundle, np.ndarray]:
    """A bundle fitted by the service on a scikit-learn data set, and its training matrix."""
    values = DATASETS[data]().data
    count = COMPONENTS[components]
    count = values.shape[1] if count == "all" else count
    return fit_bundle(values, config_for(range(values.shape[1]), scaling=scaling, components=count,
                                         method=method)), values


def evaluation_rows(values: np.ndarray, seed: int = 0) -> np.ndarray:
    """The training rows plus the same rows moved by seeded noise of half a column std (fresh records)."""
    rng = np.random.default_rng(seed)
    moved = values + rng.normal(scale=0.5 * values.std(axis=0), size=values.shape)
    return np.vstack([values, moved])


def reference_estimator(bundle: Bundle, training: np.ndarray):
    """The fitted final step scikit-learn predicts with: the stored KMeans, or for agglomerative bundles a
    NearestCentroid fitted on the clusterer's own labels (its centroids_ are the member means)."""
    if bundle.config.method == "kmeans":
        return bundle.clusterer
    space = bundle.project(bundle.scaled(training))
    return NearestCentroid().fit(space, bundle.clusterer.labels_)


def sklearn_reference(bundle: Bundle, training: np.ndarray, x: np.ndarray) -> dict[str, np.ndarray]:
    """Everything assign returns, recomputed with the stored scikit-learn objects (NaN = missing)."""
    imputed = bundle.imputer.transform(x)                                      # SimpleImputer(median)
    scaled = imputed if bundle.scaler is None else bundle.scaler.transform(imputed)
    space = scaled if bundle.pca is None else bundle.pca.transform(scaled)     # PCA.transform
    estimator = reference_estimator(bundle, training)
    if bundle.config.method == "kmeans":
        all_distances = estimator.transform(space)                            # KMeans.transform
    else:
        all_distances = cdist(space, estimator.centroids_)                    # direct Euclidean
    labels = estimator.predict(space)                                         # KMeans / NearestCentroid.predict
    pipeline = Pipeline([
        ("impute", bundle.imputer),
        ("scale", bundle.scaler if bundle.scaler is not None else "passthrough"),
        ("pca", bundle.pca if bundle.pca is not None else "passthrough"),
        ("cluster", estimator),
    ])
    order = np.argsort(all_distances, axis=1, kind="stable")
    rows = np.arange(x.shape[0])
    if bundle.pca is None:
        residual = np.zeros(x.shape[0])
    else:                                                                      # PCA.inverse_transform
        residual = np.linalg.norm(scaled - bundle.pca.inverse_transform(space), axis=1)
    return {
        "labels": labels,
        "pipeline_labels": pipeline.predict(x),                                # Pipeline.predict
        "distance": all_distances[rows, labels],
        "runner_up": order[:, 1] if bundle.k > 1 else None,
        "runner_distance": all_distances[rows, order[:, 1]] if bundle.k > 1 else None,
        "residual": residual,
        "scaled_norm": np.linalg.norm(scaled, axis=1),
    }


def assert_matches_reference(bundle: Bundle, result, ref: dict[str, np.ndarray]) -> None:
    np.testing.assert_array_equal(result.segment, ref["labels"])
    np.testing.assert_array_equal(result.segment, ref["pipeline_labels"])
    np.testing.assert_allclose(result.distance, ref["distance"], rtol=RTOL, atol=0)
    np.testing.assert_array_equal(result.runner_up, ref["runner_up"])
    # margin: a difference of two distances, so its error is relative to the larger one.
    np.testing.assert_allclose(result.margin, ref["runner_distance"] - ref["distance"], rtol=0,
                               atol=RTOL * ref["runner_distance"].max())
    # residual: 0 exactly when PCA keeps every dimension; scikit-learn's difference of vectors then leaves
    # rounding noise of order 1e-16 * ||scaled row||, hence the small absolute tolerance.
    np.testing.assert_allclose(result.residual, ref["residual"], rtol=RTOL, atol=RTOL * ref["scaled_norm"].max())
    # Flags follow from the distances and the stored thresholds (rows within rounding of a threshold skipped).
    thresholds = bundle.distance_thresholds[ref["labels"]]
    clear = np.abs(ref["distance"] - thresholds) > RTOL * thresholds
    np.testing.assert_array_equal(result.far[clear], (ref["distance"] > thresholds)[clear])
    if bundle.pca is not None and bundle.pca.n_components_ < len(bundle.features):
        limits = bundle.residual_thresholds[ref["labels"]]           # per segment
        clear = np.abs(ref["residual"] - limits) > RTOL * limits
        np.testing.assert_array_equal(result.off_plane[clear], (ref["residual"] > limits)[clear])
    else:
        assert not result.off_plane.any()


# --------------------------------------------------------------------------- every supported config
@pytest.mark.parametrize("data, scaling, components, method", CONFIGS)
def test_assign_matches_stored_sklearn_objects(data, scaling, components, method, monkeypatch):
    # Reference: the bundle's own fitted scikit-learn objects and Pipeline.predict (see sklearn_reference).
    bundle, training = fitted(data, scaling, components, method)
    compiled = compile_bundle(bundle)
    x = evaluation_rows(training)
    ref = sklearn_reference(bundle, training, x)

    # The batch path (chunks), the few-rows path (direct distances) and many small chunks must all agree.
    assert_matches_reference(bundle, assign(compiled, x), ref)
    for start in range(0, x.shape[0], core_assign.DIRECT_ROWS):
        part = slice(start, start + core_assign.DIRECT_ROWS)
        assert_matches_reference(bundle, assign(compiled, x[part]), {k: (v[part] if v is not None else None)
                                                                     for k, v in ref.items()})
    monkeypatch.setattr(core_assign, "CHUNK_ROWS", 37)
    assert_matches_reference(bundle, assign(compiled, x), ref)


def test_agglomerative_centroids_are_member_means():
    # Reference: sklearn.neighbors.NearestCentroid computes each class's mean; API.md defines an agglomerative
    # centroid as the mean of its members in the clustering space.
    bundle, training = fitted("wine", "standard", "components-2", "agglomerative")
    reference = reference_estimator(bundle, training)
    np.testing.assert_allclose(bundle.centroids, reference.centroids_, rtol=1e-12, atol=1e-12)


def test_single_record_matches_pipeline_predict():
    # Reference: Pipeline.predict and KMeans.transform of the stored objects, one Wine row at a time.
    bundle, training = fitted("wine", "standard", "share-0.8", "kmeans")
    compiled = compile_bundle(bundle)
    for i in (0, 59, 130, 177):                         # one row of each cultivar block and the last row
        row = training[i:i + 1]
        result = assign(compiled, row)
        ref = sklearn_reference(bundle, training, row)
        assert result.segment.shape == (1,)
        assert_matches_reference(bundle, result, ref)


@pytest.mark.parametrize("data, scaling, components, method", CONFIGS)
def test_every_record_alone_matches_sklearn_and_the_batch_path(data, scaling, components, method, monkeypatch):
    # Reference: the stored scikit-learn objects (Pipeline.predict, KMeans.transform, PCA.inverse_transform; see
    # sklearn_reference) and the batch path, record by record through the single-record path: with the folded
    # matrix, and step by step (a fold limit of 0 entries) as bundles too large to fold are scored.
    bundle, training = fitted(data, scaling, components, method)
    compiled = compile_bundle(bundle)
    x = evaluation_rows(training)
    ref = sklearn_reference(bundle, training, x)
    batch = assign(compiled, x)
    for folded in (True, False):
        if not folded:
            monkeypatch.setattr(core_assign, "FOLD_MAX_ENTRIES", 0)
            compiled = compile_bundle(bundle)
        assert (compiled.single_record_form is not None) == folded
        alone = [assign(compiled, x[i:i + 1]) for i in range(x.shape[0])]
        joined = {field: None if getattr(alone[0], field) is None
                  else np.concatenate([getattr(one, field) for one in alone])
                  for field in ("segment", "distance", "runner_up", "margin", "residual", "far", "off_plane")}
        result = core_assign.Assignment(**joined)
        assert_matches_reference(bundle, result, ref)
        np.testing.assert_array_equal(result.segment, batch.segment)
        np.testing.assert_array_equal(result.runner_up, batch.runner_up)
        np.testing.assert_allclose(result.distance, batch.distance, rtol=RTOL, atol=0)
        np.testing.assert_allclose(result.residual, batch.residual, rtol=RTOL, atol=RTOL * ref["scaled_norm"].max())


def test_single_record_folded_matrix_is_the_pipeline_as_one_product():
    # Reference: the stored StandardScaler and PCA (transform, inverse_transform) and KMeans.cluster_centers_:
    # the folded product of a Wine row gives its centroid cross terms, its PCA scores and its reconstruction error.
    bundle, training = fitted("wine", "standard", "share-0.8", "kmeans")
    form = compile_bundle(bundle).single_record_form
    scaled = bundle.scaler.transform(training[:5])
    scores = bundle.pca.transform(scaled)
    assert form.centre is None                      # Wine's centres are within a few standard units: folded
    out = training[:5] @ form.matrix - form.offset
    k, d = bundle.k, scores.shape[1]
    np.testing.assert_allclose(out[:, :k], scores @ bundle.clusterer.cluster_centers_.T, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(out[:, k:k + d], scores, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(out[:, k + d:], scaled - bundle.pca.inverse_transform(scores), rtol=1e-9, atol=1e-12)


def test_single_records_with_a_large_offset_feature_keep_their_precision():
    # Reference: scikit-learn's stored StandardScaler, PCA and KMeans (KMeans.transform, KMeans.predict) and
    # PCA.inverse_transform, as test_large_offset_feature_keeps_distances_exact_against_sklearn for the batch
    # path: a feature of 1e9 + N(0, 1) one record at a time. Folding its centre would cancel ~9 digits, so the
    # single-record form keeps subtracting it first, and distances stay within 1e-9.
    rng = np.random.default_rng(8)
    latent = rng.standard_normal((3_000, 3)) + rng.choice([-2.0, 0.0, 2.0], size=(3_000, 1))
    x = np.column_stack([1e9 + latent[:, 0], latent[:, 1] * 3 + 5, latent[:, 2] - 1, latent.sum(axis=1)])
    bundle = fit_bundle(x, config_for(range(4), components=3, k=3, n_init=1))
    compiled = compile_bundle(bundle)
    assert compiled.single_record_form.centre is not None
    space = bundle.pca.transform(bundle.scaler.transform(x[:300]))
    reference = bundle.clusterer.transform(space)                           # KMeans.transform
    labels = bundle.clusterer.predict(space)                                # KMeans.predict
    scaled = bundle.scaler.transform(x[:300])
    residual = np.linalg.norm(scaled - bundle.pca.inverse_transform(space), axis=1)
    ordered = np.sort(reference, axis=1)
    for i in range(300):
        one = core_assign.assign_one(compiled, x[i])
        if ordered[i, 1] - ordered[i, 0] > 1e-12 * ordered[i, 1]:           # not an exact tie
            assert one.segment == labels[i]
        np.testing.assert_allclose(one.distance, reference[i, labels[i]], rtol=1e-9, atol=0)
        np.testing.assert_allclose(one.residual, residual[i], rtol=1e-9, atol=1e-9 * np.linalg.norm(scaled[i]))


def test_single_records_on_centroids_and_midpoints_are_recomputed(monkeypatch):
    # Reference: as test_records_on_centroids_and_midpoints (the stored objects' inverse_transform): one record
    # at a time, those in doubt (on a centroid, on a tie) take the step-by-step path and stay exact.
    bundle, _ = fitted("iris", "standard", "components-2", "kmeans")
    compiled = compile_bundle(bundle)
    raw_centroids = bundle.scaler.inverse_transform(bundle.pca.inverse_transform(bundle.centroids))
    midpoint = (raw_centroids[0] + raw_centroids[1]) / 2
    direct = core_assign._assign_one_directly
    recomputed = []
    monkeypatch.setattr(core_assign, "_assign_one_directly",
                        lambda compiled, row: recomputed.append(1) or direct(compiled, row))
    scale = np.abs(bundle.centroids).max()
    for c in range(3):
        result = assign(compiled, raw_centroids[c:c + 1])
        assert result.segment[0] == c and result.distance[0] < 1e-9 * scale
    result = assign(compiled, midpoint[None, :])
    assert {int(result.segment[0]), int(result.runner_up[0])} == {0, 1} and result.margin[0] < 1e-9 * scale
    assert len(recomputed) == 4
    assign(compiled, bundle.scaler.inverse_transform(bundle.pca.inverse_transform(bundle.centroids[:1] + 1.0)))
    assert len(recomputed) == 4                          # a record off every centroid and tie: the product


# --------------------------------------------------------------------------- imputation
def test_impute_uses_training_medians_like_simple_imputer():
    # Reference: numpy.nanmedian of the training columns, and the stored SimpleImputer(strategy="median").
    bundle, training = fitted("wine", "robust", "share-0.8", "kmeans")
    compiled = compile_bundle(bundle)
    np.testing.assert_array_equal(compiled.medians, np.nanmedian(training, axis=0))
    rng = np.random.default_rng(3)
    x = evaluation_rows(training)
    holes = rng.random(x.shape) < 0.15
    x[holes] = np.nan
    filled, missing = impute(compiled, x)
    np.testing.assert_array_equal(missing, holes)
    np.testing.assert_array_equal(filled, bundle.imputer.transform(x))
    assert_matches_reference(bundle, assign(compiled, filled), sklearn_reference(bundle, training, x))


def test_impute_without_missing_values_returns_input_and_no_mask():
    # Reference: the input itself (nothing to fill) - common practice (no single source).
    bundle, training = fitted("iris", "standard", "components-2", "kmeans")
    filled, missing = impute(compile_bundle(bundle), training)
    assert missing is None
    assert filled is training


# --------------------------------------------------------------------------- exact geometry
def test_records_on_centroids_and_midpoints():
    # Reference: records built from the centroids with the stored objects' inverse_transform (PCA, then
    # scaler) sit at distance 0 of their centroid (up to rounding); a midpoint of two centroids is
    # equidistant from both (margin 0). These rows take the direct-recompute branch of the batch path.
    bundle, _ = fitted("iris", "standard", "components-2", "kmeans")
    compiled = compile_bundle(bundle)
    raw_centroids = bundle.scaler.inverse_transform(bundle.pca.inverse_transform(bundle.centroids))
    midpoint = (raw_centroids[0] + raw_centroids[1]) / 2
    x = np.vstack([raw_centroids, midpoint[None, :]] * 10)              # 40 rows: the chunked path
    scale = np.abs(bundle.centroids).max()
    for result in (assign(compiled, x), assign(compiled, x[:4])):
        n = result.segment.size
        kinds = np.arange(n) % 4
        on_centroid = kinds < 3
        np.testing.assert_array_equal(result.segment[on_centroid], kinds[on_centroid])
        assert np.all(result.distance[on_centroid] < 1e-9 * scale)
        assert np.all(result.margin[~on_centroid] < 1e-9 * scale)
        assert all({s, r} == {0, 1} for s, r in zip(result.segment[~on_centroid], result.runner_up[~on_centroid]))
        # The midpoint's distance is half the distance between the two centroids (cdist reference).
        half = cdist(bundle.centroids[:1], bundle.centroids[1:2])[0, 0] / 2
        np.testing.assert_allclose(result.distance[~on_centroid], half, rtol=RTOL)


def count_recomputed_rows(monkeypatch) -> list[int]:
    """Record how many rows the batch path hands to the direct recompute."""
    rows: list[int] = []
    direct = core_assign._two_nearest

    def counting(compiled, z):
        rows.append(z.shape[0])
        return direct(compiled, z)

    monkeypatch.setattr(core_assign, "_two_nearest", counting)
    return rows


def test_batch_path_recomputes_only_doubtful_rows(monkeypatch):
    # Reference: IEEE 754 double rounding (common practice): Wine records and their noisy copies lie nowhere
    # near a centroid or a tie at the 1e-4 relative scale, so the expansion is trusted for every one of them;
    # records built on centroids and on a midpoint (as in the test above) are all recomputed.
    bundle, training = fitted("wine", "standard", "share-0.8", "kmeans")
    compiled = compile_bundle(bundle)
    recomputed = count_recomputed_rows(monkeypatch)
    assign(compiled, evaluation_rows(training))
    assert sum(recomputed) == 0
    raw_centroids = bundle.scaler.inverse_transform(bundle.pca.inverse_transform(bundle.centroids))
    midpoint = (raw_centroids[0] + raw_centroids[1]) / 2
    x = np.vstack([evaluation_rows(training), raw_centroids, midpoint[None, :]])
    result = assign(compiled, x)
    assert sum(recomputed) == 4
    ref = sklearn_reference(bundle, training, x[:-1])      # the midpoint is a tie: either answer is right
    np.testing.assert_array_equal(result.segment[:-1], ref["labels"])
    np.testing.assert_array_equal(result.segment[-4:-1], [0, 1, 2])
    assert {int(result.segment[-1]), int(result.runner_up[-1])} == {0, 1}


def test_single_segment_has_no_runner_up():
    # Reference: KMeans(n_clusters=1).transform of the stored object; with one segment there is no runner-up.
    values = load_iris().data
    bundle = fit_bundle(values, config_for(range(4), components=2, k=1))
    result = assign(compile_bundle(bundle), evaluation_rows(values))
    ref = bundle.clusterer.transform(bundle.project(bundle.scaled(evaluation_rows(values))))[:, 0]
    assert result.runner_up is None and result.margin is None
    np.testing.assert_array_equal(result.segment, 0)
    np.testing.assert_allclose(result.distance, ref, rtol=RTOL)


def test_off_plane_record_is_flagged_for_residual_only():
    # Reference: the stored PCA's components_, transform and inverse_transform: a scaled record moved
    # orthogonally to every kept axis has the same PCA scores (so the same nearest centroid and distance);
    # its reconstruction error becomes the old one plus the move, whose length is 10x the residual threshold.
    bundle, training = fitted("wine", "standard", "share-0.8", "kmeans")
    compiled = compile_bundle(bundle)
    scaled = bundle.scaler.transform(training[:1])
    axes = bundle.pca.components_
    rng = np.random.default_rng(5)
    direction = rng.normal(size=scaled.shape[1])
    direction -= axes.T @ (axes @ direction)
    direction /= np.linalg.norm(direction)
    original_error = scaled - bundle.pca.inverse_transform(bundle.pca.transform(scaled))
    move = 10 * bundle.residual_thresholds.max() * direction
    moved_raw = bundle.scaler.inverse_transform(scaled + move)
    np.testing.assert_allclose(bundle.pca.transform(bundle.scaler.transform(moved_raw)),
                               bundle.pca.transform(scaled), atol=1e-9)
    before, after = assign(compiled, training[:1]), assign(compiled, moved_raw)
    assert after.segment[0] == before.segment[0]
    np.testing.assert_allclose(after.distance, before.distance, rtol=1e-9)
    np.testing.assert_allclose(after.residual[0], np.linalg.norm(original_error + move), rtol=1e-9)
    assert after.off_plane[0] and not after.far[0] and after.outlier[0]


def test_far_along_a_kept_axis_is_flagged_for_distance_only():
    # Reference: the stored PCA: a move along a kept axis changes the scores by the move's length and leaves
    # the reconstruction error as it was.
    bundle, training = fitted("wine", "standard", "share-0.8", "kmeans")
    compiled = compile_bundle(bundle)
    scaled = bundle.scaler.transform(training[:1])
    moved_raw = bundle.scaler.inverse_transform(scaled + 50 * bundle.pca.components_[0])
    before, after = assign(compiled, training[:1]), assign(compiled, moved_raw)
    np.testing.assert_allclose(after.residual, before.residual, rtol=1e-9, atol=1e-12)
    assert after.far[0] and not after.off_plane[0]


# --------------------------------------------------------------------------- calibration
CALIBRATION_FEATURES = 6
LATENT_CENTERS = np.array([[0.0, 0.0], [8.0, 0.0], [0.0, 8.0], [8.0, 8.0]])
# A fixed full-rank map of the 2-D latent plane into 6 features (so the features are correlated and PCA(2)
# recovers the plane), plus isotropic noise off the plane.
MIXING = np.random.default_rng(0).normal(size=(2, CALIBRATION_FEATURES))
NOISE_SD = 0.3


def draw(n: int, seed: int) -> np.ndarray:
    """Four unit-variance Gaussian blobs on a plane (sklearn.datasets.make_blobs, seeded), mapped into 6
    features, plus N(0, 0.3^2) noise in every feature: a known distribution to draw fresh records from."""
    latent, _ = make_blobs(n_samples=n, n_features=2, centers=LATENT_CENTERS, cluster_std=1.0, random_state=seed)
    return latent @ MIXING + np.random.default_rng(seed).normal(scale=NOISE_SD, size=(n, CALIBRATION_FEATURES))


@pytest.fixture(scope="module", params=[0.99, 0.95], ids=["q0.99", "q0.95"])
def calibrated(request):
    q = request.param
    training = draw(20_000, seed=1)
    # silhouette_sample: these tests never read the silhouette; 500 rows of it instead of the default 10,000
    # (~2 s of CPU per fit on 20,000 rows).
    bundle = fit_bundle(training, config_for(range(CALIBRATION_FEATURES), components=2, k=4,
                                             outlier_quantile=q, n_init=3, silhouette_sample=500))
    return q, training, bundle, compile_bundle(bundle)


def test_flag_rates_on_fresh_records_match_the_quantile(calibrated):
    # Reference: split-conformal coverage (Vovk, Gammerman & Shafer 2005; Lei et al., JASA 2018): the combined
    # per-segment threshold is the ceil((n_c + 1) q)-th held-out score of ~4,000 rows per segment, so a fresh
    # record of the segment is flagged with probability 1 - q (up to 1 / (n_c + 1)). Sampling error (binomial):
    # for q = 0.99 the rate over 20,000 fresh records has sd ~0.07 %, the threshold's own coverage ~0.16 % per
    # segment; the bands below are more than 3 sd wide.
    q, _, bundle, compiled = calibrated
    fresh = draw(20_000, seed=2)
    result = assign(compiled, fresh)
    expected = 1 - q
    assert 0.8 * expected <= result.outlier.mean() <= 1.2 * expected, result.outlier.mean()
    for c in range(bundle.k):
        rate = result.outlier[result.segment == c].mean()
        assert 0.5 * expected <= rate <= 1.5 * expected, (c, rate)
    # Both rules take part: the score is max(distance / D_c, residual / R_c), so each flags some records.
    assert 0.2 * expected <= result.far.mean() <= expected
    assert 0.2 * expected <= result.off_plane.mean() <= expected


def test_records_ten_sd_from_all_data_are_all_flagged(calibrated):
    # Reference: each feature moved 10 population standard deviations (numpy std of the training data) from
    # the training mean, sign chosen at random: no training record is anywhere near (common practice: a
    # 10-sigma point lies outside any 0.95/0.99 quantile of Gaussian data).
    _, training, _, compiled = calibrated
    signs = np.random.default_rng(4).choice([-1.0, 1.0], size=(1_000, CALIBRATION_FEATURES))
    far = training.mean(axis=0) + 10 * training.std(axis=0) * signs
    result = assign(compiled, far)
    assert result.outlier.all()
