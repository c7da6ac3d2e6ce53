"""The chart functions on the edge cases of real fits (Fisher's Iris, ``load_iris``): a fixed k of 1 (no
silhouette), a fixed k (one-point curve), more segments than the palette has colours, a feature without z.
Each must give a PNG of the promised size; what the pictures show was checked by eye when they were made."""

from __future__ import annotations

import numpy as np
import pytest

from service import charts
from service.core.bundle import FitConfig
from service.core.fit import fit_bundle
from tests.conftest import png_size


def report_of(values: np.ndarray, **config) -> dict:
    bundle = fit_bundle(values, FitConfig(features=[f"f{j}" for j in range(values.shape[1])], n_init=2, **config))
    return {"name": "iris", "version": 1, **bundle.report}


@pytest.mark.parametrize("config", [
    {"k_min": 1, "k_max": 1, "k_fixed": True},
    {"k_min": 3, "k_max": 3, "k_fixed": True},
    {"k_min": 2, "k_max": 12, "method": "agglomerative", "linkage": "ward"},
    {"k_min": 2, "k_max": 6, "selection": "silhouette"},
], ids=["k-1", "k-fixed", "k-12-agglomerative", "silhouette"])
def test_selection_and_profiles_draw_any_fit(iris, config):
    report = report_of(iris.data, **config)
    for png in (charts.selection_png(report), charts.profiles_png(report)):
        width, height = png_size(png)
        assert width >= 800 and height >= 500


def test_profiles_draw_a_cell_without_z(iris):
    report = report_of(iris.data, k_min=3, k_max=3, k_fixed=True)
    report["segments"][0]["profile"]["f0"]["z"] = None          # as the report says when a z is undefined
    assert png_size(charts.profiles_png(report))[0] >= 800


def test_profile_matrix_is_the_reports_z(iris):
    report = report_of(iris.data, k_min=3, k_max=3, k_fixed=True)
    z = charts.profiles.z_matrix(report)
    assert z.shape == (3, 4)
    assert z[2, 1] == report["segments"][2]["profile"]["f1"]["z"]


def test_drift_history_draws_an_empty_history():
    assert png_size(charts.drift_history_png("iris", [], psi_watch=0.1, psi_alert=0.25)) == (1000, 625)


def test_drift_history_draws_many_features_and_reports(wine):
    """Thirteen features (Wine) over 30 reports: at most ten lines, thinned time labels; still one PNG."""
    rng = np.random.default_rng(3)
    names = list(wine.feature_names)
    reports = [{"id": f"r{i}", "version": 1 + i // 20, "created_at": f"2026-12-{1 + i // 24:02d}T{i % 24:02d}:00:00Z",
                "status": ("stable", "watch", "alert")[i % 3],
                "features": [{"name": n, "psi": float(rng.gamma(1.0, 0.1 * (1 + j)))} for j, n in enumerate(names)]}
               for i in range(30)][::-1]
    assert png_size(charts.drift_history_png("wine", reports, psi_watch=0.1, psi_alert=0.25)) == (1000, 625)
