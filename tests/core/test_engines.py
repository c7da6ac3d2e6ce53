"""The fit engines: the out-of-core engine against the in-memory one (scikit-learn data sets and metrics), and
its exact order statistics against numpy."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

from schemas.fit import FIT_ENGINES
from service.core.assign import assign, compile_bundle, impute
from service.core.bundle import FitConfig
from service.engines import CLUSTER_ENGINE, ENGINES, order_stats, resolve_engine, run_engine
from service.engines import source as source_module
from service.settings import Settings
from service.engines.out_of_core import fit_out_of_core
from service.engines.source import MatrixFile
from service.errors import InvalidInput


@pytest.fixture
def small_chunks(monkeypatch):
    """Chunks of 1024 rows, so that a few thousand rows take several passes' worth of chunks."""
    monkeypatch.setattr(source_module, "CHUNK_BYTES", 1)


def _segments(bundle, values):
    compiled = compile_bundle(bundle)
    filled, _ = impute(compiled, values)
    return assign(compiled, filled).segment


def _blobs(n=6000, p=6, centers=4, seed=3, missing_every=0):
    """sklearn.datasets.make_blobs: isotropic Gaussian blobs with known segments."""
    values, truth = make_blobs(n_samples=n, n_features=p, centers=centers, cluster_std=1.0, random_state=seed)
    if missing_every:
        values[::missing_every, 1] = np.nan
    return values, truth


def test_engine_names_are_listed_once():
    assert (*ENGINES, CLUSTER_ENGINE) == FIT_ENGINES
    settings = Settings(out_of_core_rows=10, max_fit_rows=100)
    assert resolve_engine("auto", 10, settings) == "memory"
    assert resolve_engine("auto", 11, settings) == "out_of_core"
    assert resolve_engine("memory", 10 ** 9, settings) == "memory"
    # auto goes to the cluster above dask_auto_rows only when a scheduler is set
    with_cluster = Settings(out_of_core_rows=10, dask_scheduler="tcp://127.0.0.1:1", dask_auto_rows=50)
    assert resolve_engine("auto", 51, with_cluster) == CLUSTER_ENGINE
    assert resolve_engine("auto", 50, with_cluster) == "out_of_core"


@pytest.mark.parametrize("scaling, components, missing_every", [("standard", 0.9, 0), ("robust", 3, 53)],
                         ids=["standard-share", "robust-count-missing"])
def test_out_of_core_segments_agree_with_in_memory_on_blobs(tmp_path, small_chunks, scaling, components,
                                                           missing_every):
    values, truth = _blobs(missing_every=missing_every)
    config = FitConfig(features=[f"f{j}" for j in range(values.shape[1])], scaling=scaling, components=components,
                       k_min=2, k_max=6, selection="silhouette", n_init=4)
    memory = run_engine("memory", values, config, max_agglomerative_rows=100)
    matrix = MatrixFile.write(tmp_path / "values.f64", values)
    streamed = fit_out_of_core(matrix, config)
    assert memory.report["engine"] == "memory" and streamed.report["engine"] == "out_of_core"
    assert streamed.k == memory.k == 4
    # Adjusted Rand index (sklearn.metrics.adjusted_rand_score) between the two engines' assignments: the
    # issue's agreement bar is 0.95.
    assert adjusted_rand_score(_segments(memory, values), _segments(streamed, values)) >= 0.95
    assert adjusted_rand_score(truth, _segments(streamed, values)) >= 0.95
    # Exact parts: the same training matrix digest and the same (exact) imputation medians.
    assert streamed.report["data_sha256"] == memory.report["data_sha256"]
    assert streamed.report["imputation_medians"] == memory.report["imputation_medians"]
    # Same report shape; the drift reference's decile edges equal numpy's (np.quantile) to rounding.
    assert set(streamed.report) == set(memory.report)
    for mine, reference in zip(streamed.reference.bin_edges, memory.reference.bin_edges):
        np.testing.assert_allclose(mine, reference, rtol=1e-12)
    np.testing.assert_allclose(streamed.reference.means, memory.reference.means, rtol=1e-9)
    np.testing.assert_array_equal(streamed.reference.sample, memory.reference.sample)
    if scaling == "robust":
        np.testing.assert_allclose(streamed.scaler.center_, memory.scaler.center_, rtol=1e-12)
        np.testing.assert_allclose(streamed.scaler.scale_, memory.scaler.scale_, rtol=1e-12)
    # Held-out thresholds: the same conformal calibration, fold models fitted in passes (rates near 1 - q).
    assert abs(streamed.report["calibration"]["held_out_flag_rate"] - 0.01) < 0.01


def test_out_of_core_reports_the_steps_in_order(tmp_path, small_chunks):
    values, _ = _blobs(n=3000)
    seen: list[tuple[str, float]] = []
    config = FitConfig(features=[f"f{j}" for j in range(values.shape[1])], k_min=2, k_max=3, n_init=2)
    fit_out_of_core(MatrixFile.write(tmp_path / "v.f64", values), config,
                    progress=lambda step, fraction: seen.append((step, fraction)))
    order = list(dict.fromkeys(step for step, _ in seen))
    assert order == ["reading", "scaling", "reducing", "clustering k=2", "clustering k=3", "profiling"]
    fractions = [fraction for _, fraction in seen]
    assert fractions == sorted(fractions) and 0 <= fractions[0] and fractions[-1] < 1


def test_out_of_core_refuses_agglomerative(tmp_path):
    values, _ = _blobs(n=200)
    config = FitConfig(features=[f"f{j}" for j in range(values.shape[1])], method="agglomerative", k_min=2, k_max=3)
    with pytest.raises(InvalidInput) as caught:
        fit_out_of_core(MatrixFile.write(tmp_path / "v.f64", values), config)
    assert caught.value.problems[0].field == "method"


def test_out_of_core_checks_like_memory(tmp_path):
    values, _ = _blobs(n=200)
    values[:, 2] = 7.0
    config = FitConfig(features=[f"f{j}" for j in range(values.shape[1])], k_min=2, k_max=3)
    with pytest.raises(InvalidInput) as in_memory:
        run_engine("memory", values, config, max_agglomerative_rows=100)
    with pytest.raises(InvalidInput) as streamed:
        fit_out_of_core(MatrixFile.write(tmp_path / "v.f64", values), config)
    assert streamed.value.detail == in_memory.value.detail


# --------------------------------------------------------------------------- exact order statistics
def test_order_statistics_equal_numpy_medians_and_quantiles(monkeypatch):
    # Small caps force the refinement loop (histogram, min/max of a tied bin, second histogram) on small data.
    monkeypatch.setattr(order_stats, "COLLECT_CAP", 50)
    rng = np.random.default_rng(1)
    n = 20_001
    values = np.column_stack([rng.normal(size=n), rng.integers(0, 5, n).astype(float),
                              rng.exponential(size=n) * 1e6])
    values[rng.random(n) < 0.1, 0] = np.nan
    values[5, 2] = 1e90                                   # one huge value: the first histogram is nearly useless
    groups = rng.integers(0, 3, n)

    def chunks():
        for start in range(0, n, 4000):
            yield values[start:start + 4000], groups[start:start + 4000]

    counts, lows, highs = order_stats.counts_and_ranges(chunks, 3, 3)
    wanted = []
    for g in range(3):
        for j in range(3):
            m = int(counts[g, j])
            wanted += [(g, j, r) for r in order_stats.median_ranks(m)]
            for share in (0.1, 0.25, 0.75, 0.9):
                a, b, _ = order_stats.quantile_ranks(m, share)
                wanted += [(g, j, a), (g, j, b)]
    found = order_stats.order_statistics(chunks, wanted, counts=counts, lows=lows, highs=highs)
    for g in range(3):
        for j in range(3):
            column = values[groups == g, j]
            column = column[~np.isnan(column)]
            m = int(counts[g, j])
            # Reference: numpy's median (exact) and quantile ("linear" method; equal to rounding).
            assert order_stats.median_from(found, g, j, m) == np.median(column)
            for share in (0.1, 0.25, 0.75, 0.9):
                assert order_stats.quantile_from(found, g, j, m, share) == pytest.approx(
                    np.quantile(column, share), rel=1e-12)


def test_matrix_file_chunks_cover_the_rows_with_no_short_tail(tmp_path):
    values = np.arange(2050 * 3, dtype=float).reshape(2050, 3)
    matrix = MatrixFile.write(Path(tmp_path) / "m.f64", values).select([2, 0])
    blocks = list(matrix.chunks(rows=1024, min_rows=5))
    assert [start for start, _ in blocks] == [0, 1024]          # the 2-row tail joins the block before it
    np.testing.assert_array_equal(np.vstack([b for _, b in blocks]), values[:, [2, 0]])
    np.testing.assert_array_equal(matrix.load(), values[:, [2, 0]])
