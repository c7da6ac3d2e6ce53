"""HTTP benchmark (not a test): single-record assign throughput with 1 vs 2 uvicorn workers, side by side.

All on 127.0.0.1 and bounded in time:
1. fits the benchmark bundle of run_http_bench.py (StandardScaler -> PCA(5) -> KMeans(8) on make_blobs data)
   into a temporary store, and copies it so each server has its own;
2. starts ``segscore serve --workers 1`` and ``segscore serve --workers 2`` (the command as deployed: each
   worker pins BLAS to one thread and loads the live version at start-up; with 2, /metrics is in multiprocess
   mode) with the Docker image's thread settings;
3. runs wrk (post.lua, one thread) with a single-record body at --connections connections against each,
   alternating which goes first, for --rounds rounds, after a warm-up;
4. records requests/s, p50/p99 (wrk's latency distribution), failed requests, and the CPU time used by wrk
   (rusage of the wrk child: the load generator runs on the same cores as the servers) and by each server
   (the whole process tree: parent and workers), as shares of one core; prints medians and the 2/1 ratio.

The load generator is wrk (Debian package ``wrk``, installed with ``apt-get install -y wrk``); without it the
script says so and exits 0 (skipped).

    .venv/bin/python bench/http/bench_workers.py [--rounds 3] [--duration 8] [--warmup 2] [--connections 16]
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE.parent))   # bench/, for machine.py
sys.path.insert(0, str(HERE))

from machine import cpu_model, load_average  # noqa: E402
from run_http_bench import (  # noqa: E402
    CLOCK_TICKS,
    NAME,
    SERVER_ENV,
    free_port,
    prepare_store,
    run_wrk,
    write_bodies,
)


def tree_cpu_seconds(root_pid: int) -> float:
    """utime + stime of ``root_pid`` and every process below it (the uvicorn parent and its workers)."""
    parents, cpu = {}, {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            parents[int(entry.name)] = int(fields[1])
            cpu[int(entry.name)] = (int(fields[11]) + int(fields[12])) / CLOCK_TICKS

    def below(pid: int) -> bool:
        while pid in parents and pid > 1:
            if pid == root_pid:
                return True
            pid = parents[pid]
        return False

    return sum(seconds for pid, seconds in cpu.items() if below(pid))


class Server:
    def __init__(self, workers: int, store: Path, workdir: Path) -> None:
        self.workers = workers
        port = free_port()
        self.url = f"http://127.0.0.1:{port}/v1/segmentations/{NAME}/assign"
        self.ready = f"http://127.0.0.1:{port}/readyz"
        segscore = Path(sys.executable).with_name("segscore")
        env = {**{k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")}, **SERVER_ENV,
               "PYTHONPATH": str(ROOT), "SEGSCORE_LOG_LEVEL": "warning"}
        self.log = (workdir / f"server-{workers}.log").open("w")
        self.process = subprocess.Popen([str(segscore), "serve", "--workers", str(workers), "--store", str(store),
                                         "--port", str(port)], cwd=workdir, env=env, stdout=self.log,
                                        stderr=subprocess.STDOUT, start_new_session=True)

    def wait_ready(self, timeout: float = 180.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and self.process.poll() is None:
            try:
                with urllib.request.urlopen(self.ready, timeout=2) as response:
                    if response.status == 200:
                        return
            except OSError:
                time.sleep(0.2)
        raise RuntimeError(f"server with {self.workers} worker(s) did not start; see {self.log.name}")

    def stop(self) -> None:
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(timeout=30)
        self.log.close()


def measure(server: Server, body: Path, connections: int, seconds: float, warmup: float) -> dict:
    if warmup > 0:
        run_wrk(server.url, body, connections, warmup)
    cpu_before = tree_cpu_seconds(server.process.pid)
    summary = run_wrk(server.url, body, connections, seconds)
    wall = summary["duration_us"] / 1e6
    summary["rps"] = summary["requests"] / wall
    summary["wrk_cpu_share"] = summary["wrk_cpu_s"] / wall
    summary["server_cpu_share"] = (tree_cpu_seconds(server.process.pid) - cpu_before) / wall
    summary["failed"] = sum(summary[k] for k in ("connect_errors", "read_errors", "write_errors",
                                                  "status_errors", "timeouts"))
    return summary


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--duration", type=float, default=8.0, help="seconds per measured wrk run")
    parser.add_argument("--warmup", type=float, default=2.0, help="seconds of warm-up before each run")
    parser.add_argument("--connections", type=int, default=16)
    args = parser.parse_args()
    if args.rounds < 2:
        parser.error("--rounds must be at least 2 (rounds alternate which server goes first)")
    if shutil.which("wrk") is None:
        print("SKIPPED: wrk is not installed. On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk")
        return 0

    started = time.monotonic()
    workdir = Path(tempfile.mkdtemp(prefix="segscore-workers-bench-"))
    servers: list[Server] = []
    try:
        print("fitting the bundle and writing request bodies ...", flush=True)
        prepare_store(workdir / "store-1")
        shutil.copytree(workdir / "store-1", workdir / "store-2")
        body = write_bodies(workdir)[1]
        servers = [Server(n, workdir / f"store-{n}", workdir) for n in (1, 2)]
        for server in servers:
            server.wait_ready()
        runs: dict[int, list[dict]] = {1: [], 2: []}
        for round_number in range(args.rounds):
            order = servers if round_number % 2 == 0 else servers[::-1]
            for server in order:
                print(f"round {round_number + 1}: {server.workers} worker(s), {args.duration:g} s ...", flush=True)
                runs[server.workers].append(measure(server, body, args.connections, args.duration, args.warmup))
    finally:
        for server in servers:
            server.stop()
        shutil.rmtree(workdir, ignore_errors=True)

    def median(workers: int, key: str) -> float:
        return statistics.median(run[key] for run in runs[workers])

    print()
    print(f"== single-record assign over HTTP, {args.connections} connections: 1 vs 2 uvicorn workers ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average now {load_average()}; "
          f"server env {SERVER_ENV}")
    print(f"load generator: wrk -t1 (Debian package 'wrk', apt-get install -y wrk) on the same cores; "
          f"{args.rounds} rounds of {args.duration:g} s after a {args.warmup:g} s warm-up, order alternating")
    header = f"{'workers':>7s} {'req/s':>9s} {'p50 ms':>8s} {'p99 ms':>8s} {'failed':>6s} {'wrk CPU':>8s} {'srv CPU':>8s}"
    print(header)
    print("-" * len(header))
    for workers in (1, 2):
        print(f"{workers:7d} {median(workers, 'rps'):9,.0f} {median(workers, 'p50_us') / 1000:8.2f} "
              f"{median(workers, 'p99_us') / 1000:8.2f} {sum(r['failed'] for r in runs[workers]):6d} "
              f"{median(workers, 'wrk_cpu_share'):7.0%} {median(workers, 'server_cpu_share'):7.0%}")
    print("(medians over the rounds; wrk CPU / srv CPU: CPU time of wrk / of the server's processes during a run,"
          " as a share of one core)")
    for workers in (1, 2):
        print(f"  rounds, {workers} worker(s): " + ", ".join(f"{r['rps']:,.0f}" for r in runs[workers]) + " req/s")
    print(f"2 workers / 1 worker, requests/s: {median(2, 'rps') / median(1, 'rps'):.2f}x")
    print(f"total time {time.monotonic() - started:.0f} s; servers stopped")
    return 1 if any(r["failed"] for rs in runs.values() for r in rs) else 0


if __name__ == "__main__":
    sys.exit(main())
