"""Benchmark (not a test): a big gzip CSV fit upload keeps the server's memory bounded.

A real server process (``segscore serve``, started as the tests start one) receives a gzip-compressed CSV of
ROWS x 20 (sklearn.datasets.make_blobs, seeded) streamed from a file by http.client, with ``engine=out_of_core``.
Measured: the upload's size, compressed and not, the wall time of the request, and the peak resident set
(VmHWM from /proc) of the server process and of the fit worker (the forkserver's child, sampled while it runs).
The server spools the body to a file and reads it in 16 MiB blocks, so its peak should stay far below the
upload's size; the worker holds one chunk of the matrix and a few numbers per row.

    python bench/bench_big_upload.py [--rows 1000000]
"""

from __future__ import annotations

import argparse
import gzip
import http.client
import json
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tests.serving import segscore_server  # noqa: E402

FEATURES = 20


def _write_csv_gz(path: Path, rows: int) -> int:
    from sklearn.datasets import make_blobs
    raw = 0
    with gzip.open(path, "wb", compresslevel=1) as out:
        header = (",".join(f"f{j}" for j in range(FEATURES)) + "\n").encode()
        out.write(header)
        raw += len(header)
        for start in range(0, rows, 100_000):
            size = min(100_000, rows - start)
            values, _ = make_blobs(n_samples=size, n_features=FEATURES, centers=6, random_state=0)
            values += np.random.default_rng(start).normal(scale=0.01, size=values.shape)
            text = "\n".join(",".join(f"{v:.6g}" for v in row) for row in values).encode() + b"\n"
            out.write(text)
            raw += len(text)
    return raw


def _hwm_kib(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def _descendants(pid: int) -> list[int]:
    found, frontier = [], [pid]
    while frontier:
        parent = frontier.pop()
        children = []
        for task in Path(f"/proc/{parent}/task").glob("*"):       # children of every thread
            try:
                children += (task / "children").read_text().split()
            except OSError:
                pass
        found += [int(c) for c in children]
        frontier += [int(c) for c in children]
    return found


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=1_000_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="segscore-upload-bench-") as scratch:
        work = Path(scratch)
        upload = work / "big.csv.gz"
        raw = _write_csv_gz(upload, args.rows)
        env = {"SEGSCORE_MAX_BODY_BYTES": str(4 * 1024 ** 3), "SEGSCORE_MAX_FIT_ROWS": "1000000",
               "SEGSCORE_FIT_TIME_LIMIT_SECONDS": "3600"}
        with segscore_server(work, "--store", str(work / "store"), settings_env=env) as base:
            before = set(_descendants(os.getpid()))
            server_pids = sorted(before)
            peaks: dict[int, int] = {}
            done = threading.Event()

            def sample() -> None:
                while not done.is_set():
                    for pid in _descendants(os.getpid()):
                        peaks[pid] = max(peaks.get(pid, 0), _hwm_kib(pid))
                    time.sleep(0.5)

            sampler = threading.Thread(target=sample, daemon=True)
            sampler.start()
            started = time.perf_counter()
            host, port = base.split("//")[1].split(":")
            connection = http.client.HTTPConnection(host, int(port), timeout=3600)
            with open(upload, "rb") as body:         # http.client sends a file object in blocks
                connection.request("POST", "/v1/segmentations/big/fit?k=2-4&engine=out_of_core", body=body,
                                   headers={"content-type": "text/csv", "content-encoding": "gzip",
                                            "content-length": str(upload.stat().st_size)})
                answer = connection.getresponse()
                status, report = answer.status, json.loads(answer.read())
            wall = time.perf_counter() - started
            done.set()
            sampler.join()
            server_peak = max(_hwm_kib(pid) for pid in server_pids)
        print(f"rows {args.rows}: upload {upload.stat().st_size / 2**20:.0f} MiB gzip, {raw / 2**20:.0f} MiB CSV; "
              f"status {status}, engine {report.get('engine')}, k {report.get('k')}, "
              f"wall {wall:.1f} s")
        print(f"server process peak RSS {server_peak / 1024:.0f} MiB; every process under the bench, peak RSS "
              f"(sampled): " + ", ".join(f"{pid}: {kib / 1024:.0f} MiB" for pid, kib in sorted(peaks.items())))


if __name__ == "__main__":
    main()
