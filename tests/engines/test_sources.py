"""Fit sources: only locations under SEGSCORE_SOURCE_PREFIXES are read; every trick to leave them is a 403
before anything is opened. No cluster is needed: the refusal comes first."""

from __future__ import annotations

import os

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.engines import dask_ops
from service.engines.sources import check_source
from service.errors import InvalidInput, SourceForbidden
from service.settings import Settings


@pytest.fixture
def lake(tmp_path):
    """/lake/customers.parquet and /lake/part/*.csv inside the prefix; /secret/ outside it."""
    (tmp_path / "lake" / "part").mkdir(parents=True)
    (tmp_path / "secret").mkdir()
    (tmp_path / "lake" / "customers.parquet").write_bytes(b"PAR1")
    (tmp_path / "lake" / "part" / "a.csv").write_text("x\n1\n")
    (tmp_path / "secret" / "payroll.csv").write_text("x\n1\n")
    return tmp_path


def test_no_prefix_configured_refuses_every_source_and_names_the_setting(lake):
    with pytest.raises(SourceForbidden) as refused:
        check_source(f"file://{lake}/lake/customers.parquet", ())
    assert "SEGSCORE_SOURCE_PREFIXES" in refused.value.detail


@pytest.mark.parametrize("source", [
    "{root}/secret/payroll.csv",                       # plainly outside
    "file://{root}/secret/payroll.csv",
    "{root}/lake/../secret/payroll.csv",               # .. segments
    "file://{root}/lake/%2e%2e/secret/payroll.csv",    # percent-encoded dots
    "{root}/lake/./../secret/payroll.csv",
    "{root}/lakeside/x.csv",                           # a sibling that merely starts with the prefix's name
    "lake/customers.parquet",                          # relative
    "{root}/la*/customers.parquet",                    # wildcard above the last segment
], ids=["outside", "outside-url", "dotdot", "encoded-dotdot", "dot", "sibling", "relative", "glob-in-folder"])
def test_paths_outside_the_prefix_are_refused(lake, source):
    with pytest.raises(SourceForbidden):
        check_source(source.format(root=lake), (f"file://{lake}/lake/",))


def test_a_symbolic_link_inside_the_prefix_that_leads_outside_is_refused(lake):
    os.symlink(lake / "secret" / "payroll.csv", lake / "lake" / "part" / "b.csv")
    prefixes = (f"{lake}/lake",)
    with pytest.raises(SourceForbidden):
        check_source(f"{lake}/lake/part/b.csv", prefixes)
    with pytest.raises(SourceForbidden):          # reached through a wildcard
        check_source(f"{lake}/lake/part/*.csv", prefixes)
    with pytest.raises(SourceForbidden):          # reached through the dataset folder
        check_source(f"{lake}/lake/part", prefixes)
    os.symlink(lake / "secret", lake / "lake" / "door")
    with pytest.raises(SourceForbidden):          # a linked folder
        check_source(f"{lake}/lake/door/payroll.csv", prefixes)


def test_sources_inside_the_prefix_resolve_to_their_files(lake):
    prefixes = (f"file://{lake}/lake/",)
    parquet = check_source(f"file://{lake}/lake/customers.parquet", prefixes)
    assert parquet.format == "parquet" and parquet.paths == (str(lake / "lake" / "customers.parquet"),)
    csv = check_source(f"{lake}/lake/part/*.csv", prefixes)
    assert csv.format == "csv" and csv.paths == (str(lake / "lake" / "part" / "a.csv"),)
    with pytest.raises(InvalidInput):
        check_source(f"{lake}/lake/missing.parquet", prefixes)


def test_remote_urls_need_a_prefix_of_the_same_scheme_at_a_segment_boundary():
    prefixes = ("s3://bank/segments/",)
    assert check_source("s3://bank/segments/2026/customers.parquet", prefixes).paths == (
        "s3://bank/segments/2026/customers.parquet",)
    for source in ("s3://bank/segments-old/x.parquet", "s3://bank/other/x.parquet", "gs://bank/segments/x.parquet",
                   "s3://bank/segments/../private/x.parquet", "s3://bank/segments/%2E%2E/private/x.parquet"):
        with pytest.raises(SourceForbidden):
            check_source(source, prefixes)


def test_fit_route_answers_403_for_a_source_without_prefixes_and_outside_them(lake):
    for prefixes, source in (((), f"file://{lake}/lake/customers.parquet"),
                             ((f"file://{lake}/lake/",), f"file://{lake}/lake/../secret/payroll.csv")):
        settings = Settings(store_dir=lake / "store", source_prefixes=prefixes, dask_scheduler="tcp://127.0.0.1:9")
        with TestClient(create_app(settings)) as client:
            response = client.post("/v1/segmentations/lake/fit", json={"source": source})
        assert response.status_code == 403
        assert "SEGSCORE_SOURCE_PREFIXES" in str(response.json()["detail"])


def test_engine_dask_without_a_scheduler_is_a_422_naming_the_setting(lake):
    with TestClient(create_app(Settings(store_dir=lake / "store"))) as client:
        response = client.post("/v1/segmentations/x/fit", json={"records": [{"a": 1.0}, {"a": 2.0}], "engine": "dask"})
    assert response.status_code == 422 and "SEGSCORE_DASK_SCHEDULER" in str(response.json()["detail"])


def test_order_statistics_match_numpy_on_ties_and_wide_ranges():
    """dask_ops.select against numpy's sort (the definition of an order statistic), blocks run in-process."""
    rng = np.random.default_rng(0)
    blocks = [np.concatenate([rng.integers(0, 5, 40_000).astype(float), rng.standard_cauchy(30_000),
                              [1e12, -1e12]])[:, None] for _ in range(3)]
    everything = np.sort(np.concatenate(blocks).ravel())

    def compute_blocks(fn, *args):
        return dask_ops.COMBINE[fn]([fn(block, dask_ops.Where(i, 0), *args) for i, block in enumerate(blocks)])

    ranks = [0, 1, 50_000, 100_000, 150_000, everything.size - 1]
    found = dask_ops.select(compute_blocks, dask_ops.observed_by_feature, [(0, r) for r in ranks])
    assert np.array_equal(found, everything[ranks])


def test_column_statistics_merged_over_blocks_equal_those_of_the_whole_matrix():
    """dask_ops.COMBINE merges block results in a tree on the workers: merging the column statistics of 7 blocks
    (in groups of 3, then again) gives numpy's counts, sums, extremes and distinct values of the whole matrix;
    the drift-bin probe keeps each column's 21 smallest distinct values (all of them for a column with fewer)."""
    rng = np.random.default_rng(5)
    values = np.column_stack([rng.integers(0, 8, 7000).astype(float), rng.normal(size=7000), np.full(7000, 2.5)])
    values[rng.random(values.shape) < 0.05] = np.nan
    bounds = [0, 1, 900, 2000, 2001, 4500, 6000, 7000]
    merge = dask_ops.COMBINE[dask_ops.column_moments]
    parts = [dask_ops.column_moments(values[a:b], dask_ops.Where(i, a))
             for i, (a, b) in enumerate(zip(bounds, bounds[1:]))]
    merged = merge([merge(parts[i:i + 3]) for i in range(0, len(parts), 3)])
    assert merged["rows"] == 7000
    assert np.array_equal(merged["observed"], (~np.isnan(values)).sum(axis=0))
    assert np.allclose(merged["sum"], np.nansum(values, axis=0), rtol=1e-12, atol=0)
    assert np.array_equal(merged["min"], np.nanmin(values, axis=0))
    assert np.array_equal(merged["max"], np.nanmax(values, axis=0))
    for j in range(values.shape[1]):
        distinct = np.unique(values[~np.isnan(values[:, j]), j])
        assert np.array_equal(merged["probe"][j], distinct[:dask_ops.DISTINCT_PROBE])
    assert merged["probe"][0].size == 8 and merged["probe"][1].size == dask_ops.DISTINCT_PROBE
