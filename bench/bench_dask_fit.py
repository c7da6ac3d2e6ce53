"""Benchmark (not a test): a fit on a local Dask cluster of 1 and 2 workers, for several dataset sizes.

Data: Parquet datasets of N x 20 (files of 250,000 rows), 6 Gaussian blobs (fixed seeded centres, unit spread)
with 2 % of the values missing, written chunk by chunk (never whole in memory). Fit: standard scaling,
PCA(0.9), k-means k = 4..8 (n_init 3), 5-fold held-out thresholds: the Dask engine's every step.

Layout per run: this process starts a ``distributed.LocalCluster`` (the scheduler lives here) with W worker
processes (1 thread each), and a fresh child process plays the server: it connects a Client, calls
``fit_on_dask`` and reports its wall time, its peak RSS before the fit (after imports and connecting) and
after it (VmHWM of /proc/self/status; ``ru_maxrss`` would carry the parent's peak across fork and exec). Each worker's peak RSS is read from /proc/<pid>/status (VmHWM) before the cluster
closes (the workers are fresh per run). The server's growth must stay flat as N grows: the data never passes
through it.

Rounds alternate the two cluster sizes for every N; medians are reported.

    python bench/bench_dask_fit.py [--sizes 250000,1000000,3000000] [--rounds 2] [--data /tmp/segscore-dask-bench]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from machine import cpu_model, load_average  # bench/ is on sys.path when a script here runs

FEATURES = [f"x{j:02d}" for j in range(20)]
ROWS_PER_FILE = 250_000


def write_dataset(folder: Path, rows: int) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    target = folder / f"rows-{rows}"
    done = target / "_complete"
    if done.exists():
        return target
    target.mkdir(parents=True, exist_ok=True)
    centres = np.random.default_rng(0).uniform(-10, 10, size=(6, len(FEATURES)))
    for part, start in enumerate(range(0, rows, ROWS_PER_FILE)):
        n = min(ROWS_PER_FILE, rows - start)
        rng = np.random.default_rng([1, part])
        values = centres[rng.integers(0, 6, n)] + rng.normal(size=(n, len(FEATURES)))
        values[rng.random(values.shape) < 0.02] = np.nan
        table = pa.table({name: pa.array(values[:, j], from_pandas=True) for j, name in enumerate(FEATURES)})
        pq.write_table(table, target / f"part-{part:05d}.parquet")
    done.write_text("")
    return target


def peak_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return 0


def code_path() -> str:
    """Where the running process imported the Dask engine's block functions from (so a run states which
    checkout it measured: the server child and the workers must use the same one)."""
    from service.engines import dask_ops

    return str(Path(dask_ops.__file__).resolve().parents[2])


def server(address: str, dataset: str) -> None:
    """The child: connect, fit, print one JSON line."""
    from distributed import Client

    from service.core.bundle import FitConfig
    from service.engines.dask_engine import fit_on_dask
    from service.engines.sources import check_source

    client = Client(address, set_as_default=False)
    source = check_source(dataset, (dataset,))
    config = FitConfig(features=FEATURES, k_min=4, k_max=8, n_init=3, seed=0)
    before = peak_kib(os.getpid())
    started = time.perf_counter()
    bundle = fit_on_dask(source, config, client=client)
    wall = time.perf_counter() - started
    after = peak_kib(os.getpid())
    client.close()
    print(json.dumps({"wall": wall, "server_before_kib": before, "server_peak_kib": after, "k": bundle.k,
                      "components": bundle.report["components"], "server_code": code_path()}))


def one_run(dataset: Path, workers: int, memory_limit: str, time_limit: float) -> dict:
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=":0", memory_limit=memory_limit) as cluster:
        env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
        child = subprocess.run([sys.executable, __file__, "--server", cluster.scheduler_address, str(dataset)],
                               capture_output=True, text=True, env=env, timeout=time_limit)
        if child.returncode:
            raise RuntimeError(child.stderr[-3000:])
        result = json.loads(child.stdout.strip().splitlines()[-1])
        with Client(cluster, set_as_default=False) as client:
            pids = client.run(os.getpid)
            result["worker_code"] = sorted(set(client.run(code_path).values()))
        result["worker_peak_kib"] = sorted(peak_kib(pid) for pid in pids.values())
    return result


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", default="250000,1000000,3000000")
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--data", default="/tmp/segscore-dask-bench")
    parser.add_argument("--memory-limit", default="6GiB")
    parser.add_argument("--time-limit", type=float, default=3 * 3600.0,
                        help="seconds one fit may take before the run is abandoned (default 3 h)")
    parser.add_argument("--workers", default="1,2", help="cluster sizes to compare (default 1,2)")
    parser.add_argument("--server", nargs=2)
    args = parser.parse_args()
    if args.server:
        server(*args.server)
        return
    sizes = [int(s) for s in args.sizes.split(",")]
    cluster_sizes = [int(w) for w in args.workers.split(",")]
    print(f"# {platform.python_version()} {cpu_model()} load {load_average()}")
    datasets = {n: write_dataset(Path(args.data), n) for n in sizes}
    results: dict[tuple[int, int], list[dict]] = {}
    for round_ in range(args.rounds):
        for n in sizes:
            for workers in (cluster_sizes if round_ % 2 == 0 else cluster_sizes[::-1]):
                run = one_run(datasets[n], workers, args.memory_limit, args.time_limit)
                results.setdefault((n, workers), []).append(run)
                print(f"round {round_} rows {n} workers {workers}: {run['wall']:.1f} s, worker peaks "
                      f"{[round(k / 1024) for k in run['worker_peak_kib']]} MiB, server "
                      f"{run['server_before_kib'] / 1024:.0f} -> {run['server_peak_kib'] / 1024:.0f} MiB, load "
                      f"{load_average()}, code {run['server_code']} (workers {run['worker_code']})", flush=True)
    print("\n| rows x 20 | workers | wall s (median) | peak per worker MiB | server peak MiB (before fit -> after) |")
    print("|---|---|---|---|---|")
    for (n, workers), runs in sorted(results.items()):
        wall = statistics.median(r["wall"] for r in runs)
        worker = statistics.median(max(r["worker_peak_kib"]) for r in runs) / 1024
        before = statistics.median(r["server_before_kib"] for r in runs) / 1024
        after = statistics.median(r["server_peak_kib"] for r in runs) / 1024
        print(f"| {n:,} | {workers} | {wall:.1f} | {worker:.0f} | {before:.0f} -> {after:.0f} |")
    print(f"# load afterwards {load_average()}")


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    main()
