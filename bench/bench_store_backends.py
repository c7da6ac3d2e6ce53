"""Benchmark (not a test): the store backends side by side.

1. Single-record assign throughput through the whole app (``TestClient``, in process) on the ``local`` backend
   and on the ``postgres`` backend. The assign path reads only memory (service/store/cache.py), so the two should
   be within 10 % of each other. Candidates run interleaved (a batch of calls of each in turn, many rounds), so
   load from other processes hits both alike; medians are reported.
2. How long a promote made through one replica takes to be served by another (two apps on one PostgreSQL
   schema, each with its own background loop and LISTEN connection): median and maximum over repeats.

Needs PostgreSQL: SEGSCORE_TEST_DATABASE_URL (default postgresql://postgres@127.0.0.1:5432/test); a schema of
its own is created and dropped.

    python bench/bench_store_backends.py [--rounds 30] [--calls 50] [--promotes 20]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
import uuid
from pathlib import Path

import psycopg
from fastapi.testclient import TestClient
from sklearn.datasets import load_iris

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from service.app import create_app  # noqa: E402
from service.settings import Settings  # noqa: E402
from tests.conftest import with_search_path  # noqa: E402

DEFAULT_URL = "postgresql://postgres@127.0.0.1:5432/test"


def records():
    iris = load_iris()
    return [dict(zip(iris.feature_names, map(float, row))) for row in iris.data]


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=30)
    parser.add_argument("--calls", type=int, default=50)
    parser.add_argument("--promotes", type=int, default=20)
    args = parser.parse_args()
    url = os.environ.get("SEGSCORE_TEST_DATABASE_URL", DEFAULT_URL)
    schema = f"segscore_bench_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(url, autocommit=True) as connection:
        connection.execute(f'CREATE SCHEMA "{schema}"')
    rows = records()
    try:
        with tempfile.TemporaryDirectory() as tmp:
            local = Settings(store_dir=Path(tmp) / "local")
            postgres = Settings(store_backend="postgres", database_url=with_search_path(url, schema),
                                store_dir=Path(tmp) / "artifacts")
            with TestClient(create_app(local)) as a, TestClient(create_app(postgres)) as b, \
                    TestClient(create_app(postgres)) as replica:
                for client in (a, b):
                    assert client.post("/v1/segmentations/shop/fit", json={"records": rows, "k": 3}).status_code == 201
                one = {"records": rows[:1]}
                per_call: dict[str, list[float]] = {"local": [], "postgres": []}
                for _ in range(args.rounds):
                    for label, client in (("local", a), ("postgres", b)):
                        started = time.perf_counter()
                        for _ in range(args.calls):
                            client.post("/v1/segmentations/shop/assign", json=one)
                        per_call[label].append((time.perf_counter() - started) / args.calls)
                medians = {label: statistics.median(values) for label, values in per_call.items()}
                print("single-record assign through the app (TestClient), median of "
                      f"{args.rounds} rounds x {args.calls} calls")
                for label, median in medians.items():
                    print(f"  {label:9s} {1 / median:8.0f} assigns/s  ({median * 1e3:.3f} ms per call)")
                print(f"  postgres / local throughput: {medians['local'] / medians['postgres']:.3f}")

                delays = []
                for i in range(args.promotes):
                    target = 2 if i % 2 == 0 else 1
                    if i == 0:
                        b.post("/v1/segmentations/shop/fit", json={"records": rows, "k": 2, "make_live": False})
                    replica.post("/v1/segmentations/shop/assign", json=one)
                    started = time.perf_counter()
                    assert b.put("/v1/segmentations/shop/live", json={"version": target}).status_code == 200
                    while replica.post("/v1/segmentations/shop/assign", json=one).json()["version"] != target:
                        time.sleep(0.002)
                    delays.append(time.perf_counter() - started)
                print(f"promote on one app -> served by the other: median {statistics.median(delays) * 1e3:.0f} ms, "
                      f"max {max(delays) * 1e3:.0f} ms over {args.promotes} promotes")
    finally:
        with psycopg.connect(url, autocommit=True) as connection:
            connection.execute(f'DROP SCHEMA "{schema}" CASCADE')


if __name__ == "__main__":
    main()
