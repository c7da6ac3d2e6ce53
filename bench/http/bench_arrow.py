"""HTTP benchmark (not a test): 10,000-record assign requests as Arrow IPC streams against the same records as
JSON, one uvicorn server, driven by wrk.

What it does, all on 127.0.0.1 and bounded in time:
1. fits StandardScaler -> PCA(5) -> KMeans(8) on 100,000 x 20 synthetic records (make_blobs, 8 centres,
   random_state=0) with the service core into a temporary store (the bundle of run_http_bench.py);
2. writes one body of 10,000 fresh records from the same distribution twice: as JSON ``{"records": [...]}``
   and as an Arrow IPC stream (one float64 column per feature, written by pyarrow);
3. starts one uvicorn server (service.app:create_app, one worker, access log off, OMP/OPENBLAS threads 1 as in
   docker/Dockerfile) and checks that the formats agree on that body: Arrow in / Arrow out gives the JSON
   answer's segments, outlier flags and distances (within 1e-12);
4. measures, alternating for ``--rounds`` rounds (default 3) with wrk (post.lua, 2 connections as in
   run_http_bench.py's batch scenario):
     json    Content-Type application/json, answer JSON
     arrow   Content-Type application/vnd.apache.arrow.stream, Accept the same (answer Arrow)
     arrow-in-json-out   an Arrow body answered in JSON (for the record: which side the time goes to)
   and prints per-round figures and the medians of records/s, p50, and the server's and wrk's CPU share.

Target (issue 13 item 3): Arrow >= 5x the records/s of JSON on 10,000-record requests.

Needs wrk (Debian/Ubuntu: `apt-get install wrk`); without it the script says so and exits 0 (skipped).

    .venv/bin/python bench/http/bench_arrow.py [--duration 8] [--warmup 2] [--rounds 3] [--quick]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))  # bench/, for the scripts' shared helpers

import numpy as np  # noqa: E402
import orjson  # noqa: E402
import pyarrow as pa  # noqa: E402
from sklearn.datasets import make_blobs  # noqa: E402

from machine import cpu_model, load_average  # noqa: E402
from run_http_bench import (  # noqa: E402  (the same bundle, server handling and CPU accounting)
    FEATURES,
    N_BLOBS,
    N_FEATURES,
    NAME,
    ROOT,
    SERVER_ENV,
    Server,
    children_cpu_seconds,
    free_port,
    prepare_store,
    process_cpu_seconds,
)

ARROW = "application/vnd.apache.arrow.stream"
N_RECORDS, CONNECTIONS = 10_000, 2
# label -> (body file key, Content-Type, Accept)
CANDIDATES = {
    "json": ("json", "application/json", "application/json"),
    "arrow": ("arrow", ARROW, ARROW),
    "arrow-in-json-out": ("arrow", ARROW, "application/json"),
}


def write_bodies(folder: Path) -> dict[str, Path]:
    fresh, _ = make_blobs(n_samples=N_RECORDS, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    fresh = fresh[np.random.default_rng(1).permutation(fresh.shape[0])]
    json_path, arrow_path = folder / "body.json", folder / "body.arrows"
    json_path.write_bytes(orjson.dumps({"records": [dict(zip(FEATURES, row)) for row in fresh.tolist()]}))
    table = pa.table({name: fresh[:, j] for j, name in enumerate(FEATURES)})
    with pa.OSFile(str(arrow_path), "wb") as sink, pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return {"json": json_path, "arrow": arrow_path}


def post(url: str, body: bytes, content_type: str, accept: str) -> tuple[int, bytes, str]:
    request = urllib.request.Request(url, data=body, headers={"Content-Type": content_type, "Accept": accept})
    with urllib.request.urlopen(request, timeout=120) as response:
        return response.status, response.read(), response.headers["Content-Type"]


def check_agreement(url: str, bodies: dict[str, Path]) -> int:
    status_j, json_answer, type_j = post(url, bodies["json"].read_bytes(), "application/json", "application/json")
    status_a, arrow_answer, type_a = post(url, bodies["arrow"].read_bytes(), ARROW, ARROW)
    assert (status_j, status_a, type_j, type_a) == (200, 200, "application/json", ARROW)
    want = orjson.loads(json_answer)["results"]
    got = pa.ipc.open_stream(arrow_answer).read_all()
    assert got.column("segment").to_pylist() == [r["segment"] for r in want], "segments differ"
    assert got.column("outlier").to_pylist() == [r["outlier"] for r in want], "outlier flags differ"
    distance = got.column("distance").to_numpy()
    assert np.allclose(distance, [r["distance"] for r in want], rtol=1e-12, atol=0), "distances differ"
    return len(want)


def run_wrk(url: str, body: Path, content_type: str, accept: str, seconds: float) -> dict:
    """One bounded wrk run (post.lua with Content-Type and Accept); its summary plus wrk's CPU seconds."""
    before = children_cpu_seconds()
    command = ["wrk", "-t", "1", "-c", str(CONNECTIONS), "-d", f"{seconds:g}s", "--timeout", "60s",
               "-s", str(HERE / "post.lua"), url, "--", str(body), content_type, accept]
    completed = subprocess.run(command, capture_output=True, text=True, timeout=seconds + 120)
    cpu = children_cpu_seconds() - before
    lines = [line for line in completed.stdout.splitlines() if line.startswith("WRK_JSON ")]
    if completed.returncode != 0 or not lines:
        raise RuntimeError(f"wrk failed ({completed.returncode}):\n{completed.stdout}\n{completed.stderr}")
    summary = json.loads(lines[-1].removeprefix("WRK_JSON "))
    summary["wrk_cpu_s"] = cpu
    return summary


def measure(server: Server, body: Path, content_type: str, accept: str, seconds: float, warmup: float) -> dict:
    if warmup > 0:
        run_wrk(server.url, body, content_type, accept, warmup)
    cpu_before = process_cpu_seconds(server.process.pid)
    summary = run_wrk(server.url, body, content_type, accept, seconds)
    wall = summary["duration_us"] / 1e6
    summary["records_per_s"] = summary["requests"] / wall * N_RECORDS
    summary["server_cpu_share"] = (process_cpu_seconds(server.process.pid) - cpu_before) / wall
    # Records per CPU-second of the server: less moved than records/s when other processes take the cores.
    summary["records_per_cpu_s"] = summary["records_per_s"] / max(summary["server_cpu_share"], 1e-9)
    summary["wrk_cpu_share"] = summary["wrk_cpu_s"] / wall
    summary["failed"] = sum(summary[k] for k in ("connect_errors", "read_errors", "write_errors",
                                                  "status_errors", "timeouts"))
    return summary


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--duration", type=float, default=8.0, help="seconds per measured wrk run (default 8)")
    parser.add_argument("--warmup", type=float, default=2.0, help="seconds of warm-up before each run (default 2)")
    parser.add_argument("--rounds", type=int, default=3, help="alternating rounds (default 3, at least 2)")
    parser.add_argument("--quick", action="store_true", help="3 s runs, 1 s warm-up, 2 rounds (a smoke test)")
    args = parser.parse_args()
    if args.quick:
        args.duration, args.warmup, args.rounds = 3.0, 1.0, 2
    args.rounds = max(2, args.rounds)
    if shutil.which("wrk") is None:
        print("SKIPPED: wrk is not installed. On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk")
        return 0

    started = time.monotonic()
    workdir = Path(tempfile.mkdtemp(prefix="segscore-arrow-bench-"))
    server = None
    runs: dict[str, list[dict]] = {label: [] for label in CANDIDATES}
    try:
        print("fitting the bundle and writing request bodies ...", flush=True)
        store = workdir / "store"
        prepare_store(store)
        bodies = write_bodies(workdir)
        port = free_port()
        server = Server("service", ["--factory", "service.app:create_app", "--port", str(port), "--host", "127.0.0.1",
                                    "--workers", "1", "--no-access-log", "--log-level", "warning"],
                        {**os.environ, **SERVER_ENV, "PYTHONPATH": str(ROOT), "SEGSCORE_STORE_DIR": str(store)},
                        f"http://127.0.0.1:{port}/v1/segmentations/{NAME}/assign", f"http://127.0.0.1:{port}/healthz")
        server.wait_ready()
        n = check_agreement(server.url, bodies)
        print(f"check: JSON and Arrow answers agree on {n} records (segments, outlier flags, distances 1e-12)")
        sizes = {k: p.stat().st_size for k, p in bodies.items()}
        for round_number in range(args.rounds):
            order = list(CANDIDATES) if round_number % 2 == 0 else list(reversed(CANDIDATES))
            for label in order:
                key, content_type, accept = CANDIDATES[label]
                print(f"round {round_number + 1}: {label:18s} ({args.duration:g} s) ...", flush=True)
                runs[label].append(measure(server, bodies[key], content_type, accept, args.duration, args.warmup))
    finally:
        if server is not None:
            server.stop()
        shutil.rmtree(workdir, ignore_errors=True)

    print()
    print("== 10,000-record assign requests over HTTP: JSON vs Arrow IPC stream (uvicorn, 1 worker, 127.0.0.1; "
          f"wrk -t1 -c{CONNECTIONS}) ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average now {load_average()}; "
          f"server env {SERVER_ENV}")
    print(f"bodies: JSON {sizes['json']:,} bytes, Arrow {sizes['arrow']:,} bytes; {args.rounds} alternating rounds of "
          f"{args.duration:g} s after {args.warmup:g} s warm-up each")
    header = (f"{'candidate':18s} {'records/s per round':>34s} {'median rec/s':>13s} {'p50 ms':>8s} "
              f"{'srv CPU':>8s} {'rec/srv CPU-s':>14s} {'wrk CPU':>8s} {'failed':>6s}")
    print(header)
    print("-" * len(header))
    medians, per_cpu = {}, {}
    for label, results in runs.items():
        rates = [r["records_per_s"] for r in results]
        medians[label] = statistics.median(rates)
        per_cpu[label] = statistics.median(r["records_per_cpu_s"] for r in results)
        print(f"{label:18s} {' '.join(f'{x:>10,.0f}' for x in rates):>34s} {medians[label]:13,.0f} "
              f"{statistics.median(r['p50_us'] for r in results) / 1000:8.2f} "
              f"{statistics.median(r['server_cpu_share'] for r in results):7.0%} "
              f"{per_cpu[label]:14,.0f} "
              f"{statistics.median(r['wrk_cpu_share'] for r in results):7.0%} "
              f"{sum(r['failed'] for r in results):6d}")
    print("(srv CPU / wrk CPU: CPU time of the server process / of wrk during the run, as a share of one core)")
    ratio = medians["arrow"] / medians["json"]
    print(f"Arrow / JSON records/s (medians): {ratio:.2f}x  (target >= 5x: {'met' if ratio >= 5 else 'NOT met'})")
    print(f"Arrow / JSON records per server CPU-second (medians): {per_cpu['arrow'] / per_cpu['json']:.2f}x")
    print(f"Arrow body, JSON answer / JSON: {medians['arrow-in-json-out'] / medians['json']:.2f}x (no target)")
    failed = sum(r["failed"] for results in runs.values() for r in results)
    print(f"failed requests over all runs: {failed}; total time {time.monotonic() - started:.0f} s; server stopped")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
