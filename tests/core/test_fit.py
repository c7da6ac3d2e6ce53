"""The numerical core of a fit, checked against outside references.

Each check names its reference beside it: a published data set value (REFERENCES.md), an independent
computation with a general-purpose library (numpy, scikit-learn, scipy, pandas), a published formula
re-derived here, or a hand-worked toy whose arithmetic is shown in a comment.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2, norm
from sklearn.cluster import AgglomerativeClustering, KMeans
from sklearn.datasets import make_blobs
from sklearn.decomposition import PCA
from sklearn.impute import SimpleImputer
from sklearn.metrics import adjusted_rand_score, pairwise_distances, silhouette_score
from sklearn.preprocessing import StandardScaler

from service.core.bundle import FitConfig
from service.core.calibration import conformal_quantile, min_own_rows
from service.core.fit import (check_fit_inputs, data_sha256, elbow_k, fit_bundle, jackson_mudholkar_limit,
                              kneedle_k)
from service.errors import InvalidInput


def config_for(features, **overrides) -> FitConfig:
    k = overrides.pop("k", None)
    if isinstance(k, int):
        overrides.update(k_min=k, k_max=k, k_fixed=True)
    elif isinstance(k, tuple):
        overrides.update(k_min=k[0], k_max=k[1], k_fixed=False)
    return FitConfig(features=list(features), **overrides)


def contingency(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cross-tabulation of two labelings (rows: values of a, columns: values of b)."""
    return pd.crosstab(pd.Series(a, name="a"), pd.Series(b, name="b")).to_numpy()


def assert_same_partition(a: np.ndarray, b: np.ndarray) -> dict[int, int]:
    """Same labels up to renaming: every row and every column of the contingency table has exactly one
    non-zero cell. Returns the renaming a -> b."""
    table = contingency(a, b)
    assert table.shape[0] == table.shape[1]
    assert ((table > 0).sum(axis=0) == 1).all() and ((table > 0).sum(axis=1) == 1).all(), table
    return {int(i): int(j) for i, j in zip(*np.nonzero(table))}


def standardized(x: np.ndarray) -> np.ndarray:
    # Reference: scikit-learn's StandardScaler (population std, as API.md says).
    return StandardScaler().fit_transform(x)


@pytest.fixture(scope="module")
def blobs_with_holes():
    """Seeded Gaussian blobs with ~3 % missing cells (synthetic, used only to exercise code paths;
    every expected value below is recomputed with an outside library, never typed in)."""
    x, _ = make_blobs(n_samples=600, n_features=5, centers=4, cluster_std=1.5, random_state=11)
    x = x * np.array([1.0, 10.0, 0.1, 3.0, 100.0]) + np.array([0, 50, 1, -4, 1000])
    rng = np.random.default_rng(5)
    x[rng.random(x.shape) < 0.03] = np.nan
    return x


# --------------------------------------------------------------------------- PCA
@pytest.mark.parametrize(
    "dataset, published",
    [
        # Iris, standardized: REFERENCES.md, Fisher (1936) data via sklearn.datasets.load_iris;
        # the ratios are widely published (72.96 / 22.85 / 3.67 / 0.52 %).
        ("iris", [72.96, 22.85, 3.67, 0.52]),
        # Wine, standardized: REFERENCES.md, UCI Wine via sklearn.datasets.load_wine (36.20 / 19.21 / 11.12 / 7.07 %).
        ("wine", [36.20, 19.21, 11.12, 7.07]),
    ],
    ids=["iris", "wine"],
)
def test_pca_explained_variance_ratio_matches_published_and_svd(request, dataset, published):
    data = request.getfixturevalue(dataset)
    n_features = data.data.shape[1]
    bundle = fit_bundle(data.data, config_for(data.feature_names, components=n_features, k=3))
    ratios = np.array(bundle.report["explained_variance_ratio"])

    # Published table, to the two decimals it is printed with.
    np.testing.assert_allclose(100 * ratios[:4], published, atol=0.005 + 1e-9)
    # numpy.linalg.svd of the standardized (centred) matrix: ratio_i = s_i^2 / sum(s^2).
    z = standardized(data.data)
    s = np.linalg.svd(z - z.mean(axis=0), compute_uv=False)
    np.testing.assert_allclose(ratios, s ** 2 / np.sum(s ** 2), rtol=1e-10, atol=1e-14)
    assert bundle.report["components"] == n_features


def test_pca_variance_share_keeps_the_fewest_components_reaching_it(wine):
    # Reference: numpy.linalg.svd; a share of 0.8 keeps the smallest count whose cumulative ratio >= 0.8.
    bundle = fit_bundle(wine.data, config_for(wine.feature_names, components=0.8, k=3))
    z = standardized(wine.data)
    s = np.linalg.svd(z - z.mean(axis=0), compute_uv=False)
    cumulative = np.cumsum(s ** 2) / np.sum(s ** 2)
    expected = int(np.searchsorted(cumulative, 0.8) + 1)
    assert bundle.report["components"] == expected
    assert len(bundle.report["explained_variance_ratio"]) == expected


# --------------------------------------------------------------------------- k-means
def _reference_space(x: np.ndarray, n_components: int | None) -> np.ndarray:
    """The clustering space rebuilt with scikit-learn alone: median imputer -> StandardScaler -> PCA."""
    z = StandardScaler().fit_transform(SimpleImputer(strategy="median").fit_transform(x))
    return z if n_components is None else PCA(n_components=n_components, svd_solver="full").fit_transform(z)


@pytest.mark.parametrize("dataset", ["iris", "wine", "blobs_with_holes"])
@pytest.mark.parametrize("components", [None, 0.9], ids=["no-pca", "pca-0.9"])
@pytest.mark.parametrize("seed", [0, 42])
def test_kmeans_equals_sklearn_kmeans_with_same_seed(request, dataset, components, seed):
    data = request.getfixturevalue(dataset)
    x = data if isinstance(data, np.ndarray) else data.data
    names = [f"f{j}" for j in range(x.shape[1])]
    bundle = fit_bundle(x, config_for(names, components=components, k=3, seed=seed, n_init=10))

    # Reference: sklearn.cluster.KMeans with the same seed on the same clustering space.
    n_components = None if bundle.pca is None else bundle.pca.n_components_
    space = _reference_space(x, n_components)
    reference = KMeans(n_clusters=3, n_init=10, random_state=seed).fit(space)

    renaming = assert_same_partition(bundle.clusterer.labels_, reference.labels_)
    report = bundle.report
    assert report["inertia"] == pytest.approx(reference.inertia_, rel=1e-9)
    assert report["quality"]["inertia"] == pytest.approx(reference.inertia_, rel=1e-9)
    for ours, theirs in renaming.items():
        np.testing.assert_allclose(bundle.centroids[ours], reference.cluster_centers_[theirs], rtol=1e-9, atol=1e-9)
    # Distortion = inertia / n (API.md definition).
    assert report["distortion"] == pytest.approx(reference.inertia_ / x.shape[0], rel=1e-9)
    # centroid_agreement is 1.0 for k-means: sklearn's labels are each record's nearest centre
    # (checked with sklearn.metrics.pairwise_distances).
    nearest = pairwise_distances(space, reference.cluster_centers_).argmin(axis=1)
    assert np.array_equal(nearest, reference.labels_)
    assert report["quality"]["centroid_agreement"] == 1.0


@pytest.mark.parametrize(
    "dataset, expected",
    [
        # REFERENCES.md: Iris standardized, k-means k=3, ARI vs species "about 0.62".
        ("iris", 0.62),
        # REFERENCES.md: Wine standardized, k-means k=3, ARI vs cultivar "about 0.90".
        ("wine", 0.90),
    ],
)
def test_adjusted_rand_index_against_the_known_classes(request, dataset, expected):
    data = request.getfixturevalue(dataset)
    bundle = fit_bundle(data.data, config_for(data.feature_names, components=None, k=3))
    ari = adjusted_rand_score(data.target, bundle.clusterer.labels_)  # sklearn.metrics.adjusted_rand_score
    assert ari == pytest.approx(expected, abs=0.01)
    # And reproduced with sklearn.cluster.KMeans directly, as REFERENCES.md says.
    reference = KMeans(n_clusters=3, n_init=10, random_state=0).fit(standardized(data.data))
    assert ari == pytest.approx(adjusted_rand_score(data.target, reference.labels_), abs=1e-12)


# --------------------------------------------------------------------------- agglomerative
@pytest.mark.parametrize("linkage", ["complete", "average", "single", "ward"])
@pytest.mark.parametrize("components", [None, 2], ids=["no-pca", "pca-2"])
def test_agglomerative_equals_sklearn_and_centroids_are_member_means(iris, linkage, components):
    bundle = fit_bundle(iris.data, config_for(iris.feature_names, method="agglomerative", linkage=linkage,
                                              components=components, k=3))
    space = _reference_space(iris.data, components)
    # Reference: sklearn.cluster.AgglomerativeClustering on the same space.
    reference = AgglomerativeClustering(n_clusters=3, linkage=linkage).fit(space)
    assert np.array_equal(bundle.clusterer.labels_, reference.labels_)

    # Centroids are the member means in the clustering space (API.md); reference: pandas groupby mean.
    member_means = pd.DataFrame(space).groupby(reference.labels_).mean().sort_index().to_numpy()
    np.testing.assert_allclose(bundle.centroids, member_means, rtol=1e-9, atol=1e-12)
    # centroid_agreement: share of records whose nearest centroid (sklearn pairwise_distances) is their label.
    nearest = pairwise_distances(space, member_means).argmin(axis=1)
    # One truth for sizes (issue 8): size/share count the assign rule (nearest centroid), as the thresholds and
    # the drift baseline do; clusterer_size counts the clusterer's own labels (numpy.bincount of each).
    assert [s["size"] for s in bundle.report["segments"]] == np.bincount(nearest, minlength=3).tolist()
    assert [s["clusterer_size"] for s in bundle.report["segments"]] == np.bincount(reference.labels_,
                                                                                     minlength=3).tolist()
    assert bundle.reference.segment_counts.tolist() == np.bincount(nearest, minlength=3).tolist()
    assert bundle.report["quality"]["centroid_agreement"] == pytest.approx(np.mean(nearest == reference.labels_))
    # Inertia: sum of squared distances to the own member mean (definition; numpy).
    inertia = float(((space - member_means[reference.labels_]) ** 2).sum())
    assert bundle.report["inertia"] == pytest.approx(inertia, rel=1e-9)


# --------------------------------------------------------------------------- silhouette
@pytest.mark.parametrize("method", ["kmeans", "agglomerative"])
@pytest.mark.parametrize("sample", [10_000, 100], ids=["all-records", "subsampled"])
def test_silhouette_curve_equals_sklearn_silhouette_score(wine, method, sample):
    # Wine has 178 records: a sample setting of 100 forces the subsampled path.
    config = config_for(wine.feature_names, method=method, k=(2, 5), selection="silhouette", components=0.8,
                        silhouette_sample=sample, seed=7)
    bundle = fit_bundle(wine.data, config)
    space = _reference_space(wine.data, bundle.pca.n_components_)
    expected = {}
    for k in range(2, 6):
        if method == "kmeans":
            labels = KMeans(n_clusters=k, n_init=10, random_state=7).fit(space).labels_
        else:
            labels = AgglomerativeClustering(n_clusters=k, linkage="complete").fit(space).labels_
        # Reference: sklearn.metrics.silhouette_score; same sample_size and random_state when subsampled.
        size = sample if wine.data.shape[0] > sample else None
        expected[k] = silhouette_score(space, labels, sample_size=size, random_state=7)
    curve = {row["k"]: row["silhouette"] for row in bundle.report["selection"]["curve"]}
    assert curve == pytest.approx(expected, rel=1e-9)
    # Selection by silhouette picks the best one.
    assert bundle.report["k"] == max(expected, key=expected.get)
    assert bundle.report["quality"]["silhouette"] == pytest.approx(expected[bundle.report["k"]], rel=1e-9)


# --------------------------------------------------------------------------- k selection
def test_elbow_k_on_a_hand_worked_curve():
    # Hand-worked: ks 1..5, distortions 100, 60, 20, 15, 12.
    # k scaled to [0,1]: 0, .25, .5, .75, 1;  distortion (d - 12) / 88: 1, .5455, .0909, .0341, 0.
    # Distance to the origin: k=1 1.0; k=2 sqrt(.0625 + .2975) = .600; k=3 sqrt(.25 + .0083) = .508;
    # k=4 sqrt(.5625 + .0012) = .751; k=5 1.0  ->  k = 3.
    assert elbow_k([1, 2, 3, 4, 5], [100, 60, 20, 15, 12]) == 3
    # Hand-worked: 2..5 with 10, 4, 3, 2.5: scaled k 0, 1/3, 2/3, 1; scaled d 1, .2, .0667, 0;
    # distances 1.0, sqrt(.111 + .04) = .389, sqrt(.444 + .0044) = .670, 1.0  ->  k = 3 (the second point).
    assert elbow_k([2, 3, 4, 5], [10, 4, 3, 2.5]) == 3
    # One point: that k. A flat curve: every scaled distortion is 0, the smallest k is nearest.
    assert elbow_k([4], [1.0]) == 4
    assert elbow_k([2, 3, 4], [5.0, 5.0, 5.0]) == 2


def test_kneedle_k_finds_the_obvious_knee():
    ks = list(range(1, 10))
    distortions = [90, 30, 10, 9, 8, 7, 6, 5, 4]
    # Kneedle (Satopaa et al. 2011; difference curve quoted from memory): normalise both axes to [0, 1];
    # for a decreasing convex curve the knee maximises 1 - x_n - y_n (distance below the chord).
    # x_n = (k - 1) / 8, y_n = (d - 4) / 86: k=2 .573, k=3 .680, k=4 .567  ->  knee at k = 3.
    x_n = (np.array(ks) - 1) / 8
    y_n = (np.array(distortions) - 4) / 86
    assert ks[int(np.argmax(1 - x_n - y_n))] == 3
    assert kneedle_k(ks, distortions) == 3
    assert kneedle_k([1, 2], [5.0, 1.0]) is None


def test_elbow_selection_follows_the_reported_curve(wine):
    bundle = fit_bundle(wine.data, config_for(wine.feature_names, k=(2, 8)))
    curve = bundle.report["selection"]["curve"]
    ks = np.array([row["k"] for row in curve], dtype=float)
    d = np.array([row["distortion"] for row in curve])
    # Definition from the issue, recomputed here with numpy: nearest the origin after min-max scaling.
    distance = np.hypot((ks - ks.min()) / np.ptp(ks), (d - d.min()) / np.ptp(d))
    assert bundle.report["selection"]["method"] == "elbow"
    assert bundle.report["k"] == int(ks[np.argmin(distance)])
    # Every curve point: distortion = inertia / n, and inertia equals sklearn KMeans with the same seed.
    space = _reference_space(wine.data, bundle.pca.n_components_)
    for row in curve:
        reference = KMeans(n_clusters=row["k"], n_init=10, random_state=0).fit(space)
        assert row["inertia"] == pytest.approx(reference.inertia_, rel=1e-9)
        assert row["distortion"] == pytest.approx(row["inertia"] / wine.data.shape[0], rel=1e-12)


# --------------------------------------------------------------------------- profiles
def test_profiles_in_original_units_equal_pandas_groupby(blobs_with_holes):
    x = blobs_with_holes
    names = [f"f{j}" for j in range(x.shape[1])]
    bundle = fit_bundle(x, config_for(names, k=4, components=0.9))
    labels = bundle.clusterer.labels_
    # Reference: pandas groupby on the raw (unimputed) values; missing values are skipped; std ddof=0.
    frame = pd.DataFrame(x, columns=names)
    grouped = frame.groupby(labels)
    means, medians, stds = grouped.mean(), grouped.median(), grouped.std(ddof=0)
    overall_mean, overall_std = frame.mean(), frame.std(ddof=0)
    for segment in bundle.report["segments"]:
        c = segment["id"]
        assert segment["size"] == int(np.sum(labels == c))
        assert segment["share"] == pytest.approx(np.mean(labels == c))
        for name in names:
            profile = segment["profile"][name]
            assert profile["mean"] == pytest.approx(means.at[c, name], rel=1e-9)
            assert profile["median"] == pytest.approx(medians.at[c, name], rel=1e-9)
            assert profile["std"] == pytest.approx(stds.at[c, name], rel=1e-9)
            assert profile["z"] == pytest.approx((means.at[c, name] - overall_mean[name]) / overall_std[name],
                                                 rel=1e-9, abs=1e-12)


def test_centroids_in_original_units_are_member_means_without_pca(iris):
    # A k-means centre is the mean of its members (Lloyd's algorithm at convergence), so without PCA the
    # centroid mapped back through the scaler equals pandas' groupby mean of the raw values.
    bundle = fit_bundle(iris.data, config_for(iris.feature_names, k=3, components=None))
    means = pd.DataFrame(iris.data, columns=iris.feature_names).groupby(bundle.clusterer.labels_).mean()
    for segment in bundle.report["segments"]:
        for name in iris.feature_names:
            assert segment["centroid"][name] == pytest.approx(means.at[segment["id"], name], rel=1e-9)


def test_centroids_in_original_units_invert_pca_and_scaler(wine):
    # Reference: the fitted sklearn steps' own inverse_transform (PCA back-projection, then the scaler).
    bundle = fit_bundle(wine.data, config_for(wine.feature_names, k=3, components=4))
    z = StandardScaler().fit(wine.data)
    pca = PCA(n_components=4, svd_solver="full").fit(z.transform(wine.data))
    back = z.inverse_transform(pca.inverse_transform(bundle.centroids))
    for segment in bundle.report["segments"]:
        got = [segment["centroid"][name] for name in wine.feature_names]
        np.testing.assert_allclose(got, back[segment["id"]], rtol=1e-9)


# --------------------------------------------------------------------------- thresholds and residuals
def _published_jackson_mudholkar(eigenvalues: np.ndarray, alpha: float) -> float:
    """Jackson & Mudholkar (1979), Technometrics 21(3), the Q-statistic limit, written out here from the paper
    (quoted from memory): theta_i = sum_j lambda_j^i (discarded eigenvalues), h0 = 1 - 2 theta1 theta3 / (3 theta2^2),
    Q_alpha = theta1 * [ c_alpha * sqrt(2 theta2 h0^2) / theta1 + 1 + theta2 h0 (h0 - 1) / theta1^2 ]^(1/h0)."""
    theta1, theta2, theta3 = (sum(lam ** i for lam in eigenvalues) for i in (1, 2, 3))
    h0 = 1 - (2 * theta1 * theta3) / (3 * theta2 * theta2)
    c_alpha = norm.ppf(alpha)  # scipy.stats.norm: standard normal quantile
    bracket = c_alpha * (2 * theta2 * h0 * h0) ** 0.5 / theta1 + 1 + theta2 * h0 * (h0 - 1) / theta1 ** 2
    return theta1 * bracket ** (1 / h0)


@pytest.mark.parametrize("eigenvalues", [[1.0, 0.5, 0.3, 0.2], [2.0, 0.1], [0.7] * 6], ids=["mixed", "two", "equal"])
@pytest.mark.parametrize("alpha", [0.95, 0.99])
def test_jackson_mudholkar_limit_equals_the_published_formula(eigenvalues, alpha):
    # The service returns sqrt(Q_alpha) (the residual is a distance, not a squared distance).
    expected = _published_jackson_mudholkar(eigenvalues, alpha)
    assert jackson_mudholkar_limit(np.array(eigenvalues), alpha) ** 2 == pytest.approx(expected, rel=1e-12)


def test_jackson_mudholkar_limit_with_equal_eigenvalues_is_close_to_chi_square():
    # With m equal eigenvalues lambda, Q / lambda is chi-square with m degrees of freedom and the JM formula
    # reduces to the Wilson-Hilferty approximation; reference: scipy.stats.chi2.ppf.
    for m in (3, 8, 20):
        limit = jackson_mudholkar_limit(np.full(m, 0.5), 0.99) ** 2
        assert limit == pytest.approx(0.5 * chi2.ppf(0.99, m), rel=0.01)


@pytest.mark.parametrize("eigenvalues", [[10.0] + [1.0] * 100, [1.0, 0.5, 0.3, 0.2], [0.7] * 6],
                         ids=["h0-negative", "mixed", "equal"])
def test_jackson_mudholkar_limit_against_simulated_q(eigenvalues):
    # Reference: Monte Carlo of Q = sum_j lambda_j z_j^2 with z_j standard normal (numpy, seeded) -- the
    # distribution the limit approximates. With one dominant eigenvalue among 100 small ones h0 < 0
    # (h0 = 1 - 2*110*1100 / (3*200^2) = -1.02); the formula must still give an upper limit, above the mean of Q.
    lam = np.array(eigenvalues)
    rng = np.random.default_rng(11)
    q = np.zeros(200_000)
    for start in range(0, lam.size, 20):
        block = lam[start:start + 20]
        q += (rng.standard_normal((q.size, block.size)) ** 2 * block).sum(axis=1)
    limit = jackson_mudholkar_limit(lam, 0.99) ** 2
    assert limit > lam.sum()
    # An approximation: within 10 % of the simulated 0.99 quantile of Q (here 4.5 %, 5.7 % and 0.03 %).
    assert limit == pytest.approx(np.quantile(q, 0.99), rel=0.10)


def test_residual_limits_agree_with_empirical_quantile_on_gaussian_data():
    # Sanity against simulation: Gaussian data with a known covariance; keeping 3 of 8 principal axes, the
    # training residual's 0.99 quantile (empirical) and the JM limit should be close (approximation, 5 %).
    rng = np.random.default_rng(3)
    sd = np.array([4.0, 3.0, 2.0, 1.0, 0.9, 0.8, 0.7, 0.6])
    rotation = np.linalg.qr(rng.standard_normal((8, 8)))[0]
    x = (rng.standard_normal((20_000, 8)) * sd) @ rotation.T + 10.0
    bundle = fit_bundle(x, config_for([f"f{j}" for j in range(8)], scaling="none", components=3, k=1))
    report = bundle.report
    assert report["residual_limit_jm"] == pytest.approx(report["residual_threshold"], rel=0.05)
    # The JM limit from the true discarded eigenvalues (independent of the fit) is also close.
    assert report["residual_limit_jm"] == pytest.approx(jackson_mudholkar_limit(sd[3:] ** 2, 0.99), rel=0.05)
    # And the training residual quantile vs a fresh simulation of Q = sum lambda_j z_j^2 (numpy RNG).
    q = (rng.standard_normal((400_000, 5)) ** 2 * sd[3:] ** 2).sum(axis=1)
    assert report["residual_threshold"] == pytest.approx(np.sqrt(np.quantile(q, 0.99)), rel=0.05)


@pytest.mark.parametrize("quantile", [0.9, 0.99])
def test_thresholds_are_held_out_conformal_and_share_one_multiplier(wine, quantile):
    bundle = fit_bundle(wine.data, config_for(wine.feature_names, k=3, components=3, outlier_quantile=quantile))
    # Reference pipeline in scikit-learn; residual = || scaled row - PCA reconstruction ||.
    z = StandardScaler().fit_transform(wine.data)
    pca = PCA(n_components=3, svd_solver="full").fit(z)
    residuals = np.linalg.norm(z - pca.inverse_transform(pca.transform(z)), axis=1)
    # JM limit from the discarded eigenvalues of the covariance (numpy.linalg.eigvalsh of np.cov, ddof=1).
    eigenvalues = np.sort(np.linalg.eigvalsh(np.cov(z, rowvar=False)))[::-1]
    assert bundle.report["residual_limit_jm"] ** 2 == pytest.approx(
        _published_jackson_mudholkar(eigenvalues[3:], quantile), rel=1e-9)
    # Held-out residuals are larger than in-sample ones (PCA was fitted on the training rows), so the pooled
    # held-out quantile exceeds the in-sample one (numpy.quantile).
    assert bundle.report["residual_threshold"] > np.quantile(residuals, quantile)
    # One combined score max(d / D_c, r / R_c) per segment: the two thresholds are one multiplier times the
    # segment's median in-sample distance and residual (numpy.median over the nearest-centroid segment, with
    # distances from sklearn.metrics.pairwise_distances).
    space = pca.transform(z)
    distances = pairwise_distances(space, bundle.centroids)
    nearest = distances.argmin(axis=1)
    for segment in bundle.report["segments"]:
        own = nearest == segment["id"]
        ratio = segment["distance_threshold"] / segment["residual_threshold"]
        assert ratio == pytest.approx(np.median(distances[own, segment["id"]]) / np.median(residuals[own]), rel=1e-9)
    # Wine's segments have 50-70 rows, fewer than 2 / (1 - q) at 0.99: they borrow the pooled multiplier.
    expected = ["pooled" if np.sum(nearest == c) < 2 / (1 - quantile) else "own" for c in range(3)]
    assert [s["threshold_source"] for s in bundle.report["segments"]] == expected
    # The drift baseline is the held-out flag rate; split-conformal (Vovk et al. 2005): at most 1 - q of the
    # held-out scores lie above the ceil((n + 1) q)-th smallest one.
    calibration = bundle.report["calibration"]
    assert bundle.reference.outlier_rate == bundle.report["training_outlier_rate"] == calibration["held_out_flag_rate"]
    assert bundle.reference.outlier_count == calibration["held_out_flag_count"]
    assert calibration["held_out_rows"] == wine.data.shape[0]
    assert bundle.reference.outlier_rate <= 1 - quantile


def test_conformal_quantile_rank():
    # Hand computation of the split-conformal rank ceil((n + 1) q) (Lei et al., JASA 2018):
    #   n = 199, q = 0.99 -> ceil(198.0) = 198 (not 199: (n + 1) q rounds up to 198.00000000000003 in floats);
    #   n = 9, q = 0.9 -> ceil(9.0) = 9; n = 5, q = 0.99 -> 6 > n: the largest score.
    scores = np.arange(1.0, 200.0)[::-1].copy()
    assert conformal_quantile(scores, 0.99) == 198.0
    assert conformal_quantile(np.arange(1.0, 10.0), 0.9) == 9.0
    assert conformal_quantile(np.arange(1.0, 6.0), 0.99) == 5.0
    assert min_own_rows(0.99) == 200 and min_own_rows(0.95) == 40


def test_no_pca_means_zero_residual_threshold(iris):
    bundle = fit_bundle(iris.data, config_for(iris.feature_names, k=3, components=None))
    assert bundle.report["residual_threshold"] == 0.0
    assert bundle.report["components"] is None and bundle.report["explained_variance_ratio"] == []


# --------------------------------------------------------------------------- reference profile
def test_reference_profile_deciles_and_counts(blobs_with_holes):
    x = blobs_with_holes
    bundle = fit_bundle(x, config_for([f"f{j}" for j in range(x.shape[1])], k=4))
    ref = bundle.reference
    for j in range(x.shape[1]):
        observed = x[~np.isnan(x[:, j]), j]
        # Decile edges: numpy.quantile at 0.1..0.9.
        np.testing.assert_allclose(ref.bin_edges[j], np.quantile(observed, np.linspace(0.1, 0.9, 9)))
        # Counts sum to the observed (non-missing) count and equal pandas.cut with right-closed bins.
        assert int(ref.bin_counts[j].sum()) == observed.size
        bins = np.concatenate([[-np.inf], ref.bin_edges[j], [np.inf]])
        expected = pd.Series(pd.cut(observed, bins, right=True)).value_counts(sort=False).sort_index().to_numpy()
        assert ref.bin_counts[j].tolist() == expected.tolist()
    np.testing.assert_allclose(ref.means, np.nanmean(x, axis=0))
    np.testing.assert_allclose(ref.stds, np.nanstd(x, axis=0))       # ddof=0 (API.md)
    np.testing.assert_allclose(ref.missing_share, np.isnan(x).mean(axis=0))
    assert ref.segment_shares.sum() == pytest.approx(1.0)
    assert ref.sample.shape == (x.shape[0], x.shape[1])               # under 5,000 rows: all of them


def test_reference_sample_is_capped_and_seeded():
    x, _ = make_blobs(n_samples=7_000, n_features=3, centers=3, random_state=2)
    config = config_for(["a", "b", "c"], k=3, reference_sample=5_000, seed=4)
    first, second = fit_bundle(x, config), fit_bundle(x, config)
    assert first.reference.sample.shape == (5_000, 3)
    np.testing.assert_array_equal(first.reference.sample, second.reference.sample)
    # Every sampled row is a training row (distinct rows, drawn without replacement).
    rows = {tuple(r) for r in x}
    assert all(tuple(r) in rows for r in first.reference.sample)
    assert len({tuple(r) for r in first.reference.sample}) == 5_000


# --------------------------------------------------------------------------- reproducibility
def test_seeded_fit_twice_gives_identical_report(blobs_with_holes):
    x = blobs_with_holes
    config = config_for([f"f{j}" for j in range(x.shape[1])], k=(2, 6), seed=123)
    first, second = fit_bundle(x, config), fit_bundle(x.copy(), config)
    assert first.report == second.report
    # data_sha256: hashlib.sha256 over "<rows>x<cols>:" and the float64 C-order bytes (documented layout).
    digest = hashlib.sha256(f"{x.shape[0]}x{x.shape[1]}:".encode() + np.ascontiguousarray(x).tobytes())
    assert first.report["data_sha256"] == digest.hexdigest()
    # A different matrix gives a different digest.
    changed = x.copy()
    changed[0, 0] = 1.0 if changed[0, 0] != 1.0 else 2.0
    assert fit_bundle(changed, config).report["data_sha256"] != first.report["data_sha256"]


def test_the_chunked_digest_follows_its_documented_layout():
    """data_chunks_sha256 (the Dask engine's data_sha256): "chunks:" + hashlib.sha256 over
    "<rows>x<cols>:65536-row chunks:" and the SHA-256 of each run of 65,536 rows, in order."""
    from service.core.fit import data_chunks_sha256

    x = np.random.default_rng(5).normal(size=(2 * 65_536 + 7, 3))
    x[3, 1] = np.nan
    digests = b"".join(hashlib.sha256(np.ascontiguousarray(x[s:s + 65_536]).tobytes()).digest()
                       for s in (0, 65_536, 131_072))
    expected = hashlib.sha256(f"{x.shape[0]}x3:65536-row chunks:".encode() + digests).hexdigest()
    assert data_chunks_sha256(x) == "chunks:" + expected
    # Never equal to (nor of the form of) the whole-matrix digest of the same rows.
    assert data_chunks_sha256(x) != data_sha256(x) and len(data_sha256(x)) == 64
    swapped = x.copy()
    swapped[[0, 1]] = swapped[[1, 0]]
    assert data_chunks_sha256(swapped) != data_chunks_sha256(x)


# --------------------------------------------------------------------------- checks at the door
@pytest.mark.parametrize(
    "values, overrides, field",
    [
        (np.array([[1.0, 2.0]]), {}, "records"),
        (np.array([[1.0, np.nan], [2.0, np.nan], [3.0, np.nan]]), {"k": 2}, "b"),
        (np.array([[1.0, 5.0], [2.0, 5.0], [3.0, 5.0]]), {"k": 2}, "b"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": 4}, "k"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": (2, 6)}, "k"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": 0}, "k"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": 2, "components": 3}, "components"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": 2, "components": 1.5}, "components"),
        (np.arange(8.0).reshape(4, 2) ** 2, {"k": 2, "scaling": "zscore"}, "scaling"),
    ],
    ids=["one-record", "all-missing", "constant", "k-equals-n", "k-range-over-n-1", "k-zero",
         "components-over-features", "components-share-over-1", "unknown-scaling"],
)
def test_check_fit_inputs_names_the_field(values, overrides, field):
    config = config_for(["a", "b"], **overrides)
    with pytest.raises(InvalidInput) as caught:
        check_fit_inputs(values, config, max_agglomerative_rows=100)
    assert field in [p.field for p in caught.value.problems], caught.value.detail


def test_agglomerative_row_limit_is_enforced():
    x, _ = make_blobs(n_samples=50, n_features=2, random_state=0)
    with pytest.raises(InvalidInput) as caught:
        fit_bundle(x, config_for(["a", "b"], method="agglomerative", k=2), max_agglomerative_rows=40)
    assert caught.value.problems[0].field == "method"


# --------------------------------------------------------------------------- regressions
def test_silhouette_sample_missing_a_one_record_segment_is_null_not_a_crash():
    # Regression: k-means isolates one far outlier; a seeded silhouette sample that misses it holds a single
    # label, and sklearn.metrics.silhouette_score raises ValueError on it (reference). The fit must report a
    # null silhouette for that k instead of failing.
    rng = np.random.default_rng(0)
    x = rng.standard_normal((300, 3))
    x[17] = 1e4
    labels = np.zeros(300, dtype=int)
    labels[17] = 1
    seed = next(s for s in range(50) if _sklearn_rejects_sample(x, labels, 100, s))
    bundle = fit_bundle(x, config_for(["a", "b", "c"], k=2, components=None, silhouette_sample=100, seed=seed))
    assert [s["size"] for s in bundle.report["segments"]] in ([299, 1], [1, 299])
    assert bundle.report["quality"]["silhouette"] is None
    # With silhouette selection over a range, a k whose silhouette is defined is chosen.
    ranged = fit_bundle(x, config_for(["a", "b", "c"], k=(2, 4), components=None, silhouette_sample=100, seed=seed,
                                      selection="silhouette"))
    assert ranged.report["quality"]["silhouette"] is not None and ranged.report["k"] in (3, 4)


def _sklearn_rejects_sample(x, labels, size, seed) -> bool:
    try:
        silhouette_score(x, labels, sample_size=size, random_state=seed)
    except ValueError:
        return True
    return False


def test_kneedle_k_on_a_flat_or_straight_curve_is_none_without_warnings():
    # pytest turns warnings into errors here (pyproject filterwarnings), so a library warning would fail this.
    assert kneedle_k([2, 3, 4, 5], [5.0, 5.0, 5.0, 5.0]) is None
    assert kneedle_k([2, 3, 4, 5], [10.0, 9.0, 8.0, 7.0]) is None
