"""Benchmark (not a test): one drift report on 100,000 records x 20 features, next to Pipeline.predict.

Data: synthetic records from sklearn.datasets.make_blobs (seeded; 6 centres, features put on different
scales). The version is fitted on 50,000 of them (k 6, PCA 5 components, so there is a PCA residual);
the batch is 100,000 fresh rows from the same model with two changes a drift check exists for: one
feature's mean moved by 0.5 SD and 30 % of another feature missing (so every code path runs).

    core:      service.core.drift.drift_of_batch (impute, assign fast path, every statistic)
    http csv:  POST /v1/segmentations/bench/drift through starlette's TestClient, text/csv body
               (in process: body parsing, checks, drift, schema check, SQLite write, response)
    http json: the same with a JSON body ({"records": [...]})
    predict:   sklearn Pipeline(imputer, scaler, PCA, KMeans).predict over the same rows, for scale

BLAS/OpenMP pools are limited to 1 thread with threadpoolctl (2 vCPUs shared: two pools of 2 threads
fight, see PERFORMANCE-NOTES.md). Medians of ``--repeats`` runs; the target is < 1 s of server time.

    python bench/bench_drift.py [--repeats 7] [--rows 100000]
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import orjson
import pandas as pd
import scipy
import sklearn
from fastapi.testclient import TestClient
from sklearn.datasets import make_blobs
from sklearn.pipeline import Pipeline
from threadpoolctl import threadpool_limits

from machine import cpu_model  # bench/ is on sys.path when a script here runs
from service.app import create_app
from service.core.assign import compile_bundle
from service.core.bundle import FitConfig
from service.core.drift import DriftRules, drift_of_batch
from service.core.fit import fit_bundle
from service.settings import Settings

N_FEATURES = 20
FEATURES = [f"f{j:02d}" for j in range(N_FEATURES)]
CENTERS = np.random.default_rng(0).uniform(-10, 10, size=(6, N_FEATURES))
SCALES = np.random.default_rng(1).uniform(0.5, 50.0, N_FEATURES)


def make_data(rows: int, seed: int) -> np.ndarray:
    x, _ = make_blobs(n_samples=rows, centers=CENTERS, cluster_std=2.5, random_state=seed)
    return x * SCALES


def drifted_batch(rows: int, train_std: np.ndarray) -> np.ndarray:
    x = make_data(rows, seed=2)
    x[:, 3] += 0.5 * train_std[3]
    x[np.random.default_rng(3).random(rows) < 0.3, 7] = np.nan
    return x


def median_time(fn, repeats: int) -> tuple[float, float, float]:
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        fn()
        times.append(time.perf_counter() - started)
    return statistics.median(times), min(times), max(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    threadpool_limits(1)  # one BLAS/OpenMP thread for every library, for the whole run

    print(f"CPU: {cpu_model()} ({os.cpu_count()} logical CPUs); Python {platform.python_version()}, "
          f"numpy {np.__version__}, scipy {scipy.__version__}, scikit-learn {sklearn.__version__}; "
          f"BLAS/OpenMP limited to 1 thread (threadpoolctl)")
    train = make_data(50_000, seed=1)
    config = FitConfig(features=FEATURES, components=5, k_min=6, k_max=6, k_fixed=True, n_init=3)
    bundle = fit_bundle(train, config)
    compiled = compile_bundle(bundle)
    batch = drifted_batch(args.rows, train.std(axis=0))
    rules = DriftRules()
    print(f"version: fitted on {train.shape[0]} x {N_FEATURES}, k 6, PCA 5; batch {batch.shape[0]} x {N_FEATURES}; "
          f"{args.repeats} runs each")

    rows: list[tuple[str, tuple[float, float, float]]] = []
    report = drift_of_batch(bundle, compiled, batch, rules)
    rows.append(("core drift_of_batch", median_time(lambda: drift_of_batch(bundle, compiled, batch, rules),
                                                    args.repeats)))

    pipeline = Pipeline([("impute", bundle.imputer), ("scale", bundle.scaler), ("pca", bundle.pca),
                         ("cluster", bundle.clusterer)])
    labels = pipeline.predict(batch)
    rows.append(("sklearn Pipeline.predict", median_time(lambda: pipeline.predict(batch), args.repeats)))
    # Same rows, same segments: the drift's segment counts equal the pipeline's label counts.
    assert np.bincount(labels, minlength=6).tolist() == report["segments"]["observed_count"]

    csv_body = pd.DataFrame(batch, columns=FEATURES).to_csv(index=False, na_rep="").encode()
    json_body = orjson.dumps({"records": [{f: (None if v != v else v) for f, v in zip(FEATURES, row)}
                                          for row in batch.tolist()]})
    with tempfile.TemporaryDirectory() as tmp, TestClient(create_app(Settings(store_dir=Path(tmp)))) as client:
        response = client.post("/v1/segmentations/bench/fit", content=pd.DataFrame(train, columns=FEATURES)
                                .to_csv(index=False), headers={"content-type": "text/csv"},
                                params={"k": "6", "components": "5", "n_init": "3"})
        assert response.status_code == 201, response.text
        url = "/v1/segmentations/bench/drift"

        def post(body: bytes, content_type: str) -> None:
            answer = client.post(url, content=body, headers={"content-type": content_type})
            assert answer.status_code == 200, answer.text[:500]

        post(csv_body, "text/csv")  # warm-up: bundle load and cache
        rows.append(("HTTP POST drift, CSV body", median_time(lambda: post(csv_body, "text/csv"), args.repeats)))
        rows.append(("HTTP POST drift, JSON body", median_time(lambda: post(json_body, "application/json"),
                                                               args.repeats)))
        http_report = client.get(url, params={"limit": 1}).json()["reports"][0]

    print(f"\nbody sizes: CSV {len(csv_body) / 1e6:.1f} MB, JSON {len(json_body) / 1e6:.1f} MB")
    print(f"\n| {'path (' + str(args.rows) + ' rows x 20 features)':<40} | {'median':>9} | {'min':>9} | {'max':>9} |")
    print(f"|{'-' * 42}|{'-' * 11}|{'-' * 11}|{'-' * 11}|")
    for name, (med, low, high) in rows:
        print(f"| {name:<40} | {med * 1e3:6.0f} ms | {low * 1e3:6.0f} ms | {high * 1e3:6.0f} ms |")
    flagged = [f["name"] for f in report["features"] if f["status"] != "stable"]
    print(f"\ncore report: status {report['status']}, features flagged {flagged}, segments "
          f"{report['segments']['status']}, outliers {report['outliers']['status']}, residual "
          f"{report['residual']['status']}; HTTP report status {http_report['status']}")


if __name__ == "__main__":
    main()
