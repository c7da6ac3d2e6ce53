"""The plane of the segment map (``service.charts.map_layout``), checked against scikit-learn.

Reference: scikit-learn's ``PCA`` and ``StandardScaler`` on Fisher's Iris (``load_iris``). Principal
components are defined up to sign, so coordinates are compared column by column up to a sign.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from service.charts import map_layout
from service.core.assign import assign, compile_bundle, impute
from service.core.bundle import FitConfig
from service.core.fit import fit_bundle


def assert_equal_up_to_sign(ours: np.ndarray, reference: np.ndarray) -> None:
    for j in range(reference.shape[1]):
        sign = np.sign(ours[:, j] @ reference[:, j])
        np.testing.assert_allclose(ours[:, j], sign * reference[:, j], atol=1e-9)


def layout_of(values: np.ndarray, **config):
    bundle = fit_bundle(values, FitConfig(features=[f"f{j}" for j in range(values.shape[1])], n_init=2, **config))
    compiled = compile_bundle(bundle)
    filled, _ = impute(compiled, bundle.reference.sample)
    segment = assign(compiled, filled).segment
    layout = map_layout(filled, compiled.project(filled), compiled.centroids, segment,
                        has_pca=bundle.pca is not None,
                        explained_variance_ratio=bundle.report["explained_variance_ratio"],
                        scaling=bundle.config.scaling)
    return bundle, filled, segment, layout


def test_with_pca_the_plane_is_the_versions_first_two_components(iris):
    bundle, filled, _, layout = layout_of(iris.data, components=3, k_min=3, k_max=3, k_fixed=True)
    # The version's own fitted scikit-learn steps give the reference scores.
    reference = bundle.pca.transform(bundle.scaler.transform(bundle.imputer.transform(filled)))[:, :2]
    np.testing.assert_allclose(layout.points, reference, atol=1e-9)
    np.testing.assert_allclose(layout.centroids, bundle.centroids[:, :2], atol=1e-12)
    assert "own PCA" in layout.plane
    assert f"{bundle.pca.explained_variance_ratio_[0]:.0%}" in layout.x_label


def test_without_pca_the_plane_is_the_first_two_pcs_of_the_scaled_sample(iris):
    bundle, filled, _, layout = layout_of(iris.data, components=None, k_min=3, k_max=3, k_fixed=True)
    scaled = bundle.scaler.transform(filled)
    reference_pca = PCA(n_components=2, svd_solver="full").fit(scaled)
    assert_equal_up_to_sign(layout.points, reference_pca.transform(scaled))
    # Centroids go through the same map as the points (they live in the same scaled space).
    centroid_ref = reference_pca.transform(bundle.centroids)
    assert_equal_up_to_sign(np.vstack([layout.points, layout.centroids]),
                            np.vstack([reference_pca.transform(scaled), centroid_ref]))
    assert "computed for this picture" in layout.plane and "no PCA" in layout.plane
    assert f"{reference_pca.explained_variance_ratio_[1]:.0%}" in layout.y_label


def test_with_one_component_the_sample_is_standardised_for_the_picture(iris):
    bundle, filled, segment, layout = layout_of(iris.data, components=1, k_min=3, k_max=3, k_fixed=True,
                                                scaling="minmax")
    standardised = StandardScaler().fit_transform(filled)            # population SD, as the layout uses
    assert_equal_up_to_sign(layout.points, PCA(n_components=2, svd_solver="full").fit_transform(standardised))
    for c in range(3):
        np.testing.assert_allclose(layout.centroids[c], layout.points[segment == c].mean(axis=0), atol=1e-12)
    assert "standardised" in layout.plane and "one component" in layout.plane


def test_with_one_feature_the_second_axis_is_jitter(iris):
    bundle, filled, _, layout = layout_of(iris.data[:, :1], components=None, k_min=2, k_max=2, k_fixed=True)
    np.testing.assert_allclose(layout.points[:, 0], StandardScaler().fit_transform(filled)[:, 0], atol=1e-12)
    assert np.all(np.abs(layout.points[:, 1]) <= 0.5)
    assert "jitter" in layout.y_label


@pytest.mark.parametrize("components", [2, None, 1], ids=["pca", "no-pca", "one-component"])
def test_the_layout_is_the_same_every_time(iris, components):
    first = layout_of(iris.data, components=components, k_min=3, k_max=3, k_fixed=True)[3]
    second = layout_of(iris.data, components=components, k_min=3, k_max=3, k_fixed=True)[3]
    np.testing.assert_array_equal(first.points, second.points)
