"""HTTP benchmark (not a test): the service's assign route against a naive route, both under uvicorn, driven by wrk.

What it does, all on 127.0.0.1 and bounded in time:
1. fits StandardScaler -> PCA(5) -> KMeans(8) on 100,000 x 20 synthetic records (make_blobs, 8 centres,
   random_state=0) with the service core and saves it as segmentation 'bench' version 1 in a temporary store;
2. starts two uvicorn servers, one worker each, access log off (as deployed), with the Docker image's thread
   settings (OMP_NUM_THREADS=1, OPENBLAS_NUM_THREADS=1):
     service  service.app:create_app      POST /v1/segmentations/bench/assign
     naive    bench/http/naive_app.py     POST /assign (pydantic model per record, DataFrame, Pipeline.predict,
                                          plain def handler; returns only id and segment)
3. checks that both answer 200 with the same segments on a sample body;
4. runs wrk (post.lua) against each: single-record requests at 16 connections and at 1 connection
   (requests/s, p50, p99 from wrk's latency distribution), then 100-record and 10,000-record batches
   (records/s); a short warm-up precedes each measured run; the two servers are measured alternately;
5. records the CPU time wrk and each server used during each run (rusage of the wrk child; /proc/<pid>/stat
   of the server), prints a table with the ratios against the targets, and stops both servers.

Targets: at 16 connections, >= 5x the naive route's single-record requests/s with a p99 at most a fifth of
its p99; >= 5x its records/s on 10,000-record batches.

Needs wrk (Debian/Ubuntu: `apt-get install wrk`); without it the script says so and exits 0 (skipped).

    .venv/bin/python bench/http/run_http_bench.py [--duration 10] [--warmup 2] [--quick]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE.parent))  # bench/, for the scripts' shared helpers

import numpy as np  # noqa: E402
import orjson  # noqa: E402
from sklearn.datasets import make_blobs  # noqa: E402

from machine import cpu_model, load_average  # noqa: E402  (the same machine description)
from service.core.bundle import FitConfig  # noqa: E402
from service.core.fit import fit_bundle  # noqa: E402
from service.store import FilesystemStore  # noqa: E402

NAME = "bench"
N_ROWS, N_FEATURES, N_BLOBS, N_COMPONENTS = 100_000, 20, 8, 5
FEATURES = [f"f{j:02d}" for j in range(N_FEATURES)]
SERVER_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}   # as in docker/Dockerfile
CLOCK_TICKS = os.sysconf("SC_CLK_TCK")


@dataclass
class Scenario:
    key: str
    records: int
    connections: int


SCENARIOS = [
    Scenario("single record, 16 connections", 1, 16),
    Scenario("single record, 1 connection", 1, 1),
    Scenario("100-record batches, 4 connections", 100, 4),
    Scenario("10,000-record batches, 2 connections", 10_000, 2),
]


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def process_cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / CLOCK_TICKS       # utime + stime


def children_cpu_seconds() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def prepare_store(store: Path) -> None:
    values, _ = make_blobs(n_samples=N_ROWS, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    bundle = fit_bundle(values, FitConfig(features=FEATURES, scaling="standard", components=N_COMPONENTS,
                                          k_min=N_BLOBS, k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
    FilesystemStore(store).save_version(NAME, bundle, make_live=True)


def write_bodies(folder: Path) -> dict[int, Path]:
    """Request bodies of 1, 100 and 10,000 fresh records from the same distribution (another seed)."""
    fresh, _ = make_blobs(n_samples=10_000, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    rng = np.random.default_rng(1)
    fresh = fresh[rng.permutation(fresh.shape[0])]
    bodies = {}
    for n in (1, 100, 10_000):
        path = folder / f"body_{n}.json"
        path.write_bytes(orjson.dumps({"records": [dict(zip(FEATURES, row)) for row in fresh[:n].tolist()]}))
        bodies[n] = path
    return bodies


class Server:
    def __init__(self, label: str, args: list[str], env: dict[str, str], url: str, health: str,
                 cwd: Path = ROOT) -> None:
        self.label, self.url, self.health = label, url, health
        log = tempfile.TemporaryFile()
        self.log = log
        self.process = subprocess.Popen([sys.executable, "-m", "uvicorn", *args], cwd=cwd, env=env,
                                        stdout=log, stderr=subprocess.STDOUT, start_new_session=True)

    def wait_ready(self, timeout: float = 120.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                break
            try:
                with urllib.request.urlopen(self.health, timeout=2) as response:
                    if response.status == 200:
                        return
            except OSError:
                time.sleep(0.2)
        self.log.seek(0)
        raise RuntimeError(f"{self.label} server did not start:\n{self.log.read().decode(errors='replace')[-3000:]}")

    def stop(self) -> None:
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(timeout=15)
        self.log.close()


def post(url: str, body: bytes) -> tuple[int, dict]:
    request = urllib.request.Request(url, data=body, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=120) as response:
        return response.status, orjson.loads(response.read())


def run_wrk(url: str, body: Path, connections: int, seconds: float) -> dict:
    """One bounded wrk run; returns its summary plus the CPU seconds wrk used."""
    before = children_cpu_seconds()
    command = ["wrk", "-t", "1", "-c", str(connections), "-d", f"{seconds:g}s", "--timeout", "60s",
               "-s", str(HERE / "post.lua"), url, "--", str(body)]
    completed = subprocess.run(command, capture_output=True, text=True, timeout=seconds + 120)
    cpu = children_cpu_seconds() - before
    lines = [line for line in completed.stdout.splitlines() if line.startswith("WRK_JSON ")]
    if completed.returncode != 0 or not lines:
        raise RuntimeError(f"wrk failed ({completed.returncode}):\n{completed.stdout}\n{completed.stderr}")
    summary = json.loads(lines[-1].removeprefix("WRK_JSON "))
    summary["wrk_cpu_s"] = cpu
    return summary


def measure(server: Server, body: Path, scenario: Scenario, seconds: float, warmup: float) -> dict:
    if warmup > 0:
        run_wrk(server.url, body, scenario.connections, warmup)
    cpu_before = process_cpu_seconds(server.process.pid)
    summary = run_wrk(server.url, body, scenario.connections, seconds)
    summary["server_cpu_s"] = process_cpu_seconds(server.process.pid) - cpu_before
    wall = summary["duration_us"] / 1e6
    summary["rps"] = summary["requests"] / wall
    summary["records_per_s"] = summary["rps"] * scenario.records
    summary["wrk_cpu_share"] = summary["wrk_cpu_s"] / wall
    summary["server_cpu_share"] = summary["server_cpu_s"] / wall
    summary["failed"] = sum(summary[k] for k in ("connect_errors", "read_errors", "write_errors",
                                                  "status_errors", "timeouts"))
    return summary


def ms(us: float) -> str:
    return f"{us / 1000:8.2f}"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--duration", type=float, default=10.0, help="seconds per measured wrk run (default 10)")
    parser.add_argument("--warmup", type=float, default=2.0, help="seconds of warm-up before each run (default 2)")
    parser.add_argument("--quick", action="store_true", help="3 s runs, 1 s warm-up (a smoke test)")
    args = parser.parse_args()
    if args.quick:
        args.duration, args.warmup = 3.0, 1.0
    if shutil.which("wrk") is None:
        print("SKIPPED: wrk is not installed. On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk")
        return 0

    started = time.monotonic()
    workdir = Path(tempfile.mkdtemp(prefix="segscore-http-bench-"))
    servers: list[Server] = []
    try:
        print("fitting the bundle and writing request bodies ...", flush=True)
        store = workdir / "store"
        prepare_store(store)
        bodies = write_bodies(workdir)
        base_env = {**os.environ, **SERVER_ENV, "PYTHONPATH": str(ROOT)}
        uvicorn_flags = ["--host", "127.0.0.1", "--workers", "1", "--no-access-log", "--log-level", "warning"]
        service_port, naive_port = free_port(), free_port()
        service = Server("service", ["--factory", "service.app:create_app", "--port", str(service_port), *uvicorn_flags],
                         {**base_env, "SEGSCORE_STORE_DIR": str(store)},
                         f"http://127.0.0.1:{service_port}/v1/segmentations/{NAME}/assign",
                         f"http://127.0.0.1:{service_port}/healthz")
        servers.append(service)
        naive = Server("naive", ["naive_app:app", "--app-dir", str(HERE), "--port", str(naive_port), *uvicorn_flags],
                       {**base_env, "NAIVE_STORE_DIR": str(store), "NAIVE_NAME": NAME},
                       f"http://127.0.0.1:{naive_port}/assign", f"http://127.0.0.1:{naive_port}/healthz")
        servers.append(naive)
        for server in servers:
            server.wait_ready()

        # Both answer 200 and agree on the segments of the 100-record body.
        sample = bodies[100].read_bytes()
        status_s, ours = post(service.url, sample)
        status_n, theirs = post(naive.url, sample)
        assert status_s == status_n == 200, (status_s, status_n)
        ours_segments = [r["segment"] for r in ours["results"]]
        assert ours_segments == [r["segment"] for r in theirs["results"]], "the two routes disagree"
        print(f"check: both routes answer 200 and agree on {len(ours_segments)} segments", flush=True)

        results: dict[tuple[str, str], dict] = {}
        for scenario in SCENARIOS:
            for server in (naive, service):
                print(f"running: {server.label:7s} {scenario.key} ({args.duration:g} s) ...", flush=True)
                results[(scenario.key, server.label)] = measure(server, bodies[scenario.records], scenario,
                                                                args.duration, args.warmup)
    finally:
        for server in servers:
            server.stop()
        shutil.rmtree(workdir, ignore_errors=True)

    print()
    print("== assign over HTTP (uvicorn, 1 worker, access log off, 127.0.0.1; wrk -t1, Lua POST) ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average now {load_average()}; "
          f"server env {SERVER_ENV}")
    print(f"each run: {args.duration:g} s after a {args.warmup:g} s warm-up; service and naive alternate")
    header = (f"{'scenario':40s} {'route':8s} {'req/s':>9s} {'records/s':>11s} {'p50 ms':>8s} {'p99 ms':>8s} "
              f"{'failed':>6s} {'wrk CPU':>8s} {'srv CPU':>8s}")
    print(header)
    print("-" * len(header))
    for scenario in SCENARIOS:
        for label in ("naive", "service"):
            r = results[(scenario.key, label)]
            print(f"{scenario.key:40s} {label:8s} {r['rps']:9,.0f} {r['records_per_s']:11,.0f} {ms(r['p50_us'])} "
                  f"{ms(r['p99_us'])} {r['failed']:6d} {r['wrk_cpu_share']:7.0%} {r['server_cpu_share']:7.0%}")
    print("(wrk CPU / srv CPU: CPU time used by wrk / by the server process during the run, as a share of one core)")
    print()

    def pair(key: str) -> tuple[dict, dict]:
        return results[(key, "service")], results[(key, "naive")]

    print("-- ratios (service / naive) and targets")
    ours, theirs = pair(SCENARIOS[0].key)
    ratio = ours["rps"] / theirs["rps"]
    print(f"single record @16: throughput {ratio:6.2f}x  (target >= 5x: {'met' if ratio >= 5 else 'NOT met'})")
    p99 = ours["p99_us"] / theirs["p99_us"]
    print(f"single record @16: p99 {ms(ours['p99_us']).strip()} ms vs {ms(theirs['p99_us']).strip()} ms = "
          f"{p99:5.3f} of naive  (target <= 0.2: {'met' if p99 <= 0.2 else 'NOT met'})")
    ours, theirs = pair(SCENARIOS[1].key)
    print(f"single record @1:  throughput {ours['rps'] / theirs['rps']:6.2f}x; p50 {ms(ours['p50_us']).strip()} ms vs "
          f"{ms(theirs['p50_us']).strip()} ms (no target)")
    ours, theirs = pair(SCENARIOS[2].key)
    print(f"100-record batches: records/s {ours['records_per_s'] / theirs['records_per_s']:6.2f}x (no target)")
    ours, theirs = pair(SCENARIOS[3].key)
    ratio = ours["records_per_s"] / theirs["records_per_s"]
    print(f"10,000-record batches: records/s {ratio:6.2f}x  (target >= 5x: {'met' if ratio >= 5 else 'NOT met'})")
    failed = sum(r["failed"] for r in results.values())
    print(f"failed requests (non-2xx, socket errors, timeouts) over all runs: {failed}")
    print(f"total time {time.monotonic() - started:.0f} s; servers stopped")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
