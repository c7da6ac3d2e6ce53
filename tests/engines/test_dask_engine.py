"""The Dask engine on a real local cluster (two worker processes, loopback only): it agrees with the in-memory
fit and with scikit-learn / pandas on the same data, it can be cancelled, and it survives a killed worker.

The cluster is module-scoped (started once); every wait is bounded."""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from sklearn.datasets import make_blobs
from sklearn.decomposition import PCA
from sklearn.metrics import adjusted_rand_score
from sklearn.preprocessing import StandardScaler

from service.app import create_app
from service.core.assign import assign, compile_bundle
from service.core.bundle import FitConfig
from service.core.fit import data_chunks_sha256, data_sha256, fit_bundle
from service.engines.dask_engine import CancelHook, fit_on_dask
from service.engines.sources import spill_records
from service.errors import ClusterUnavailable, FitCancelled
from service.settings import Settings
from tests.conftest import until_finished

distributed = pytest.importorskip("distributed")

FEATURES = [f"f{j}" for j in range(6)]
WAIT = 120.0     # seconds any single wait in these tests may take at most


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=":0", memory_limit="1GiB") as local:
        yield local


@pytest.fixture(scope="module")
def dask_client(cluster):
    with distributed.Client(cluster, set_as_default=False) as client:
        yield client


@pytest.fixture(scope="module")
def blobs():
    """make_blobs (scikit-learn's generator, known truth: 4 centres) with a few missing values."""
    values, truth = make_blobs(n_samples=4000, n_features=6, centers=4, cluster_std=1.5, random_state=7)
    return values, truth


@pytest.fixture(scope="module")
def in_memory(blobs):
    """The in-memory fit (service.core.fit) of the same data and config, fitted once for the module."""
    return fit_bundle(blobs[0], config())


@pytest.fixture(scope="module")
def on_cluster(dask_client, blobs, tmp_path_factory):
    """The Dask fit of the same data and config (uploaded rows spilled to Parquet), fitted once for the module."""
    return fit_on_dask(spill_records(blobs[0], FEATURES, tmp_path_factory.mktemp("spill")), config(),
                       client=dask_client)


def config(**overrides) -> FitConfig:
    base = dict(features=FEATURES, k_min=2, k_max=6, seed=0, silhouette_sample=2000, reference_sample=500)
    return FitConfig(**{**base, **overrides})


def labels_of(bundle, values):
    return assign(compile_bundle(bundle), values).segment


def lake_settings(cluster, tmp_path, lake) -> Settings:
    """A server on the test cluster that may read the folder ``lake`` (SEGSCORE_SOURCE_PREFIXES)."""
    return Settings(store_dir=tmp_path / "store", dask_scheduler=cluster.scheduler_address,
                    source_prefixes=(f"file://{lake}/",))


def fit_source(client, name: str, source: str, **params) -> dict:
    """POST a fit naming ``source``: answered 202 (a Dask fit is always a job); returns the finished job."""
    started = client.post(f"/v1/segmentations/{name}/fit", json={"source": source, **params})
    assert started.status_code == 202, started.text
    return until_finished(client, started.headers["location"])


def test_dask_fit_agrees_with_the_in_memory_fit_and_the_reference_libraries(blobs, in_memory, on_cluster):
    values, _ = blobs
    assert on_cluster.report["engine"] == "dask" and on_cluster.report["engine_details"]["workers"] == 2
    # data_sha256 on the cluster is the chunked digest of the same rows (computed here by numpy and hashlib),
    # marked so that it never equals the in-memory whole-matrix digest.
    assert on_cluster.report["data_sha256"] == data_chunks_sha256(values)
    assert in_memory.report["data_sha256"] == data_sha256(values) != on_cluster.report["data_sha256"]
    assert on_cluster.k == in_memory.k
    # Adjusted Rand index (scikit-learn) of the two versions' assignments of the training rows.
    assert adjusted_rand_score(labels_of(in_memory, values), labels_of(on_cluster, values)) >= 0.95
    # PCA explained-variance ratios: scikit-learn's PCA (full SVD) on the same standardised data.
    reference = PCA(n_components=0.9, svd_solver="full").fit(StandardScaler().fit_transform(values))
    assert np.allclose(on_cluster.report["explained_variance_ratio"], reference.explained_variance_ratio_,
                       rtol=0, atol=1e-6)
    assert_profiles_and_reference(on_cluster, in_memory, values)


def assert_profiles_and_reference(on_cluster, in_memory, values):
    # Profiles: pandas group-by means (and population stds, medians) over the version's own segments.
    segments = labels_of(on_cluster, values)
    grouped = pd.DataFrame(values, columns=FEATURES).groupby(segments)
    for segment in on_cluster.report["segments"]:
        for name in FEATURES:
            profile = segment["profile"][name]
            assert profile["mean"] == pytest.approx(grouped.mean().at[segment["id"], name], rel=0, abs=1e-9)
            assert profile["std"] == pytest.approx(grouped.std(ddof=0).at[segment["id"], name], rel=0, abs=1e-9)
            assert profile["median"] == grouped.median().at[segment["id"], name]
        assert segment["size"] == int(np.sum(segments == segment["id"]))
    # The drift reference: the same seeded training sample and decile edges as the in-memory fit (numpy).
    assert np.array_equal(on_cluster.reference.sample, in_memory.reference.sample)
    for ours, theirs in zip(on_cluster.reference.bin_edges, in_memory.reference.bin_edges):
        assert np.allclose(ours, theirs, rtol=0, atol=1e-12)


def test_the_three_engines_write_reports_with_the_same_keys(blobs, in_memory, on_cluster):
    """One report builder (service.core.report.fit_report): memory, out_of_core and dask reports of the same data
    have the same keys, at the top and inside quality, selection, its curve and every segment."""
    from service.engines import run_engine

    streamed = run_engine("out_of_core", blobs[0], config(), max_agglomerative_rows=20_000)
    reports = {"memory": in_memory.report, "out_of_core": streamed.report, "dask": on_cluster.report}
    assert {name: report["engine"] for name, report in reports.items()} == {name: name for name in reports}

    def shape(report):
        return (set(report), set(report["quality"]), set(report["selection"]),
                {frozenset(row) for row in report["selection"]["curve"]},
                {frozenset(segment) for segment in report["segments"]},
                {frozenset(segment["profile"][FEATURES[0]]) for segment in report["segments"]})

    assert shape(reports["memory"]) == shape(reports["out_of_core"]) == shape(reports["dask"])


def test_medians_and_robust_quartiles_are_exact_with_missing_values_and_ties(dask_client, tmp_path):
    """Integer-valued columns (many ties) with missing values: numpy's nanmedian and percentile are the truth."""
    rng = np.random.default_rng(3)
    values = rng.integers(0, 40, size=(3000, 3)).astype(float) + rng.normal(0, 1, (3000, 1)).round(0) * [1, 0, 0]
    values[rng.random(values.shape) < 0.05] = np.nan
    features = ["a", "b", "c"]
    bundle = fit_on_dask(spill_records(values, features, tmp_path), config(features=features, scaling="robust",
                                                                          k_min=2, k_max=3), client=dask_client)
    medians = np.nanmedian(values, axis=0)
    assert np.array_equal(bundle.imputer.statistics_, medians)
    imputed = np.where(np.isnan(values), medians, values)
    low, centre, high = np.percentile(imputed, [25, 50, 75], axis=0)
    assert np.array_equal(bundle.scaler.center_, centre)
    assert np.array_equal(bundle.scaler.scale_, high - low)


def test_cancel_stops_the_fit_and_releases_its_work_on_the_cluster(dask_client, blobs, tmp_path):
    values, _ = blobs
    hook = CancelHook()
    reached = threading.Event()
    outcome: dict[str, BaseException | None] = {}

    def progress(step: str, fraction: float) -> None:
        if step == "kmeans":
            reached.set()

    def run() -> None:
        try:
            fit_on_dask(spill_records(values, FEATURES, tmp_path), config(), client=dask_client, progress=progress,
                        cancel=hook)
            outcome["error"] = None
        except BaseException as exc:  # noqa: BLE001 - inspected below
            outcome["error"] = exc

    thread = threading.Thread(target=run)
    thread.start()
    assert reached.wait(WAIT)
    hook.cancel()
    thread.join(WAIT)
    assert not thread.is_alive()
    assert isinstance(outcome["error"], FitCancelled)
    # Nothing of the fit stays on the scheduler (its persisted data and pending tasks were released).
    deadline = time.monotonic() + 30
    while dask_client.run_on_scheduler(lambda dask_scheduler: len(dask_scheduler.tasks)) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert dask_client.run_on_scheduler(lambda dask_scheduler: len(dask_scheduler.tasks)) == 0


def cluster_tasks(cluster) -> int:
    return len(cluster.scheduler.tasks)


def test_a_fit_request_with_engine_dask_stores_an_ordinary_version(cluster, blobs, tmp_path):
    values, _ = blobs
    settings = Settings(store_dir=tmp_path / "store", dask_scheduler=cluster.scheduler_address)
    records = [dict(zip(FEATURES, map(float, row))) for row in values[:1000]]
    with TestClient(create_app(settings)) as client:
        # A fit on the cluster always runs as a background job, asked for or not.
        response = client.post("/v1/segmentations/lake/fit", json={"records": records, "engine": "dask", "k": 3})
        assert response.status_code == 202, response.text
        job = until_finished(client, response.headers["location"])
        assert job["state"] == "done", job
        report = client.get(f"/v1/jobs/{job['id']}/report").json()
        assert report["engine"] == "dask" and report["engine_details"]["workers"] == 2
        assert client.get("/v1/segmentations/lake/versions/1").json() == report
        assigned = client.post("/v1/segmentations/lake/assign", json={"records": records[:5]})
        assert assigned.status_code == 200
    # The spilled upload was removed after the fit.
    assert list((tmp_path / "store" / "dask-spill").iterdir()) == []


def test_a_background_dask_fit_is_a_job_with_steps_and_gives_an_ordinary_version(cluster, blobs, tmp_path):
    values, _ = blobs
    settings = Settings(store_dir=tmp_path / "store", dask_scheduler=cluster.scheduler_address)
    records = [dict(zip(FEATURES, map(float, row))) for row in values[:1000]]
    with TestClient(create_app(settings)) as client:
        started = client.post("/v1/segmentations/lake/fit?background=true",
                              json={"records": records, "engine": "dask", "k": 3})
        assert started.status_code == 202, started.text
        job = until_finished(client, started.headers["location"])
        assert job["state"] == "done" and job["progress"] == 1.0, job
        report = client.get(f"/v1/segmentations/lake/versions/{job['version']}").json()
        assert report["engine"] == "dask"


def test_cancelling_a_background_dask_fit_stops_it_and_writes_no_version(cluster, blobs, tmp_path):
    values, _ = blobs
    settings = Settings(store_dir=tmp_path / "store", dask_scheduler=cluster.scheduler_address)
    records = [dict(zip(FEATURES, map(float, row))) for row in values]
    with TestClient(create_app(settings)) as client:
        started = client.post("/v1/segmentations/lake/fit?background=true",
                              json={"records": records, "engine": "dask", "k": {"min": 2, "max": 8}})
        assert started.status_code == 202, started.text
        job_url = started.headers["location"]
        deadline = time.monotonic() + 60
        while client.get(job_url).json()["state"] == "queued" and time.monotonic() < deadline:
            time.sleep(0.02)
        # Seven values of k over every blob row take the cluster seconds: the cancel arrives while it works.
        cancelled = client.delete(job_url)
        assert cancelled.status_code == 200, cancelled.text
        job = until_finished(client, job_url)
        assert job["state"] == "cancelled" and job["version"] is None
        assert client.get("/v1/segmentations/lake").status_code == 404
        # The cluster let go of the fit's work.
        deadline = time.monotonic() + 30
        while cluster_tasks(cluster) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert cluster_tasks(cluster) == 0


def test_a_fit_request_naming_a_source_under_an_allowed_prefix_is_read_by_the_workers(cluster, blobs, tmp_path):
    values, _ = blobs
    lake = tmp_path / "lake"
    lake.mkdir()
    pd.DataFrame(values, columns=FEATURES).assign(customer=[f"c{i}" for i in range(len(values))]).to_parquet(
        lake / "customers.parquet")
    with TestClient(create_app(lake_settings(cluster, tmp_path, lake))) as client:
        job = fit_source(client, "lake", f"file://{lake}/customers.parquet", k=4, id_column="customer")
        assert job["state"] == "done", job
        report = client.get(f"/v1/jobs/{job['id']}/report").json()
        assert report["features"] == FEATURES and report["n_records"] == len(values)


def test_lost_scheduler_fails_with_a_clear_error(blobs, tmp_path):
    values, _ = blobs
    local = distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                                     dashboard_address=":0")
    client = distributed.Client(local, set_as_default=False)
    reached = threading.Event()
    outcome: dict[str, BaseException | None] = {}

    def progress(step: str, fraction: float) -> None:
        if step == "kmeans":
            reached.set()

    def run() -> None:
        try:
            fit_on_dask(spill_records(values, FEATURES, tmp_path), config(), client=client, progress=progress)
            outcome["error"] = None
        except BaseException as exc:  # noqa: BLE001 - inspected below
            outcome["error"] = exc

    thread = threading.Thread(target=run)
    thread.start()
    try:
        assert reached.wait(WAIT)
        local.close()
        thread.join(WAIT)
        assert not thread.is_alive()
        assert isinstance(outcome["error"], ClusterUnavailable), repr(outcome["error"])
        assert "scheduler" in str(outcome["error"].detail) and "nothing was written" in outcome["error"].detail
    finally:
        client.close(timeout=5)
        local.close()


def test_a_worker_killed_mid_fit_is_replaced_and_the_fit_completes(dask_client, blobs, in_memory, tmp_path):
    """Last in the module: it kills one of the shared cluster's worker processes (its nanny restarts it)."""
    values, _ = blobs
    killed: list[int] = []

    def progress(step: str, fraction: float) -> None:
        if step == "kmeans" and not killed:
            # Mid-fit: the data is persisted on both workers; one of them (and its blocks) disappears.
            killed.append(sorted(dask_client.run(os.getpid).values())[0])
            os.kill(killed[0], signal.SIGKILL)

    bundle = fit_on_dask(spill_records(values, FEATURES, tmp_path), config(), client=dask_client, progress=progress)
    assert len(killed) == 1 and killed[0] not in dask_client.run(os.getpid).values()
    assert adjusted_rand_score(labels_of(in_memory, values), labels_of(bundle, values)) >= 0.95


def _csv_lake(values, lake, files=4):
    """``values`` with a text id column, split in order over ``files`` CSV files part-0.csv, part-1.csv... (pandas
    writes floats with the shortest repr that reads back to the same float64)."""
    lake.mkdir()
    frame = pd.DataFrame(values, columns=FEATURES).assign(customer=[f"c{i}" for i in range(len(values))])
    for part, rows in enumerate(np.array_split(np.arange(len(values)), files)):
        frame.iloc[rows].to_csv(lake / f"part-{part}.csv", index=False)


def test_a_csv_source_named_by_a_wildcard_agrees_with_the_in_memory_fit_of_the_same_rows(cluster, blobs, tmp_path):
    values, _ = blobs
    lake = tmp_path / "lake"
    _csv_lake(values, lake)
    params = {"k": {"min": 2, "max": 6}, "seed": 0, "id_column": "customer"}
    with TestClient(create_app(lake_settings(cluster, tmp_path, lake))) as client:
        job = fit_source(client, "lake", f"file://{lake}/part-*.csv", **params)
        assert job["state"] == "done", job
        on_cluster = client.get(f"/v1/segmentations/lake/versions/{job['version']}").json()
        # The same rows (the files read back by pandas, in name order) sent as records to the in-memory engine.
        rows = pd.concat([pd.read_csv(lake / f"part-{part}.csv") for part in range(4)], ignore_index=True)
        records = [dict(zip(FEATURES, map(float, row)), customer=c)
                   for row, c in zip(rows[FEATURES].to_numpy(), rows["customer"])]
        memory = client.post("/v1/segmentations/memory/fit", json={"records": records, "engine": "memory", **params})
        assert memory.status_code == 201, memory.text
        memory = memory.json()
        assign = {}
        for name in ("lake", "memory"):
            answer = client.post(f"/v1/segmentations/{name}/assign", json={"records": records})
            assert answer.status_code == 200, answer.text
            assign[name] = np.array([row["segment"] for row in answer.json()["results"]])

    assert np.array_equal(rows[FEATURES].to_numpy(), values)          # the CSV round trip lost nothing
    assert on_cluster["engine"] == "dask" and on_cluster["engine_details"]["source_format"] == "csv"
    assert on_cluster["n_records"] == memory["n_records"] == len(values)
    assert on_cluster["features"] == memory["features"] == FEATURES
    assert on_cluster["k"] == memory["k"]
    # Four files of 1,000 rows, re-sliced into blocks for two workers: the chunked digest is that of the rows.
    assert on_cluster["data_sha256"] == data_chunks_sha256(values)
    assert memory["data_sha256"] == data_sha256(values)
    # Adjusted Rand index (scikit-learn) of the two versions' assignments of the training rows.
    assert adjusted_rand_score(assign["memory"], assign["lake"]) >= 0.95
    # Profiles: pandas group-by means over the Dask version's own segments.
    means = rows[FEATURES].groupby(assign["lake"]).mean()
    for segment in on_cluster["segments"]:
        assert segment["size"] == int(np.sum(assign["lake"] == segment["id"]))
        for name in FEATURES:
            assert segment["profile"][name]["mean"] == pytest.approx(means.at[segment["id"], name], rel=0, abs=1e-9)


def test_a_csv_file_with_another_header_is_refused_naming_the_file_and_no_value(cluster, blobs, tmp_path):
    values, _ = blobs
    lake = tmp_path / "lake"
    _csv_lake(values[:400], lake, files=3)
    # The last file's header is a data row: its "column names" are record values, which must not be echoed.
    odd = lake / "part-2.csv"
    odd.write_text("\n".join(odd.read_text().splitlines()[1:]) + "\n")
    secret = odd.read_text().splitlines()[0].split(",")[0]
    settings = lake_settings(cluster, tmp_path, lake)
    with TestClient(create_app(settings)) as client:
        job = fit_source(client, "lake", f"file://{lake}/part-*.csv", k=3, id_column="customer")
        assert job["state"] == "failed" and job["version"] is None, job
        assert client.get("/v1/segmentations/lake").status_code == 404
    detail = str(job["error"])
    assert "part-2.csv" in detail and "header" in detail and secret not in detail
    # Through the fit runner (what the job calls) the refusal is a 4xx of the error table, with the same detail.
    from service.app import status_for
    from service.errors import ServiceError
    from service.fitting import run_fit
    from service.inputs.fit_input import prepare_fit_request
    import json

    plan = prepare_fit_request(json.dumps({"source": f"file://{lake}/part-*.csv", "k": 3,
                                           "id_column": "customer"}).encode(), False, {}, settings)
    with pytest.raises(ServiceError) as refused:
        run_fit(None, plan.config, engine=plan.engine, source=plan.source, settings=settings)
    assert 400 <= status_for(refused.value) < 500 and refused.value.detail == job["error"]

    # A cell that is not a number: refused naming its column, without the cell.
    header = (lake / "part-0.csv").read_text().splitlines()[0]
    lines = odd.read_text().splitlines()
    cells = lines[3].split(",")
    cells[FEATURES.index("f2")] = "not-a-number-7"
    odd.write_text("\n".join([header, *lines[:3], ",".join(cells), *lines[4:]]) + "\n")
    with pytest.raises(ServiceError) as refused:
        run_fit(None, plan.config, engine=plan.engine, source=plan.source, settings=settings)
    detail = str(refused.value.detail)
    assert 400 <= status_for(refused.value) < 500 and "'f2'" in detail and "not-a-number-7" not in detail


def test_the_chunked_digest_on_the_cluster_is_that_of_the_rows_whatever_the_blocks(dask_client):
    """Chunks of 700 rows over blocks of 1,000, 1, 650 and 1,349 rows (chunks inside a block, across two and
    across three blocks) give numpy + hashlib's digest of the whole matrix (service.core.fit.data_chunks_sha256)."""
    import dask

    from service.engines.dask_engine import _chunked_digest, _Cluster
    from service.engines.dask_ops import Where

    values = np.random.default_rng(11).normal(size=(3000, 4))
    values[17, 2] = np.nan
    lengths = [1000, 1, 650, 1349]
    starts = np.concatenate([[0], np.cumsum(lengths)])
    blocks = dask_client.persist([dask.delayed(values[a:b].copy()) for a, b in zip(starts[:-1], starts[1:])])
    cluster = _Cluster(dask_client, CancelHook(), blocks, [Where(i, int(s)) for i, s in enumerate(starts[:-1])])
    assert _chunked_digest(cluster, lengths, 3000, 4, chunk_rows=700) == data_chunks_sha256(values, chunk_rows=700)
    assert _chunked_digest(cluster, lengths, 3000, 4, chunk_rows=700) != data_chunks_sha256(values[::-1].copy(),
                                                                                            chunk_rows=700)


def test_fold_numbers_and_draws_depend_on_the_rows_not_on_the_blocks():
    """Rows get the same fold (and k-means|| draw bits) whether they sit in one block or in four of 1, 6, 643 and
    350 rows: the numbers come from numpy's Philox at each row's global index. Folds are near-balanced."""
    from service.engines.dask_ops import N_FOLDS, Where, folds_of, row_bits

    bounds = [(0, 1), (1, 7), (7, 650), (650, 1000)]
    whole = folds_of(Where(0, 0), 1000, seed=3)
    assert np.array_equal(np.concatenate([folds_of(Where(i, a), b - a, seed=3) for i, (a, b) in enumerate(bounds)]),
                          whole)
    assert np.array_equal(np.concatenate([row_bits(Where(i, a), b - a, 3, 16, 2) for i, (a, b) in enumerate(bounds)]),
                          row_bits(Where(0, 0), 1000, 3, 16, 2))
    assert not np.array_equal(folds_of(Where(0, 0), 1000, seed=4), whole)
    # Binomial(1000, 1/5) per fold: mean 200, sd 12.6; 5 sd either side.
    assert np.all(np.abs(np.bincount(whole, minlength=N_FOLDS) - 200) < 63)


def test_what_the_server_receives_from_the_cluster_does_not_grow_with_the_blocks(dask_client, blobs, in_memory,
                                                                                 tmp_path, monkeypatch):
    """The same rows fitted as 4 and as 16 blocks: the bytes this process receives from the cluster (the pickled
    size of everything ``_Cluster.compute`` gathers) stay about the same, because the blocks' results are merged
    on the workers. Gathering each block's result made them grow with the blocks (about 4x here)."""
    import pickle

    from service.engines import dask_engine

    values, _ = blobs
    received: list[int] = []
    gather = dask_engine._Cluster.compute

    def counting(self, *collections):
        results = gather(self, *collections)
        received.append(sum(len(pickle.dumps(result, protocol=5)) for result in results))
        return results

    monkeypatch.setattr(dask_engine._Cluster, "compute", counting)
    monkeypatch.setattr(dask_engine, "MIN_BLOCK_ROWS", 250)
    source = spill_records(values, FEATURES, tmp_path)
    totals, fits = {}, {}
    for blocks in (4, 16):
        monkeypatch.setattr(dask_engine, "MAX_BLOCK_ROWS", values.shape[0] // blocks)
        received.clear()
        fits[blocks] = fit_on_dask(source, config(), client=dask_client)
        totals[blocks] = sum(received)
        assert fits[blocks].report["engine_details"]["partitions"] == blocks
    # The same fit either way (the chunked digest of the rows, the chosen k), and the results merged over
    # several blocks still match pandas' group-by and numpy's sample and deciles (the other fits here are one
    # block) ...
    assert fits[4].report["data_sha256"] == fits[16].report["data_sha256"] == data_chunks_sha256(values)
    assert fits[4].k == fits[16].k == in_memory.k
    assert adjusted_rand_score(labels_of(in_memory, values), labels_of(fits[16], values)) >= 0.95
    for fit in fits.values():
        assert_profiles_and_reference(fit, in_memory, values)
    # ... and 4x the blocks may not bring 4x the bytes: allow 25 % for the merged results' own variation.
    assert totals[16] <= 1.25 * totals[4], totals


def test_a_dask_fit_that_drops_a_constant_column_keeps_the_other_columns_statistics(dask_client, blobs, tmp_path):
    # Reference: the in-memory fit (service.core.fit, numpy) of the kept columns alone, and numpy.unique for a
    # column of four distinct values, whose drift bins are its categories. With the default features, a constant
    # column is dropped and named in the report; the kept columns' statistics, taken before the drop, must be
    # those of the kept columns alone (drift bins, profiles, assignments).
    values = blobs[0].copy()
    values[:, 5] = np.floor(values[:, 5]) % 4                       # 0, 1, 2, 3
    names = FEATURES[:3] + ["flat"] + FEATURES[3:]
    wide = np.insert(values, 3, 2.5, axis=1)                        # the constant column, fourth
    bundle = fit_on_dask(spill_records(wide, names, tmp_path), config(features=[]), client=dask_client)
    kept = fit_bundle(values, config())
    assert bundle.features == FEATURES
    assert [name for name, _ in bundle.config.dropped_features] == ["flat"]
    assert bundle.reference.bin_kinds[5] == "categories"
    assert np.array_equal(bundle.reference.bin_edges[5], np.unique(values[:, 5]))
    assert bundle.k == kept.k
    assert adjusted_rand_score(labels_of(kept, values), labels_of(bundle, values)) >= 0.95
    assert_profiles_and_reference(bundle, kept, values)
