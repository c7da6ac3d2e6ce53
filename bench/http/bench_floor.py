"""HTTP benchmark (not a test): the service's single-record assign against the framework floor, driven by wrk.

The floor (bench/http/floor_app.py) is one bare Starlette route on the same uvicorn stack that parses the same
body with orjson and answers constant results of the same shape: no scoring, no checks, no middleware. The
question is how close the service's single-record call gets to it. Goals: at 16 connections, the service's
requests/s >= 60 % of the floor's; at 1 connection, its p50 <= 1.5x the floor's.

All on 127.0.0.1, bounded in time: the bundle of bench/http/run_http_bench.py (StandardScaler -> PCA(5) ->
KMeans(8) on 100,000 x 20 make_blobs records) in a temporary store; uvicorn servers with one worker each,
access log off, one BLAS thread (as docker/Dockerfile); for each of ``--rounds`` rounds (>= 2) and each
scenario, every server is measured in turn (the order rotates each round) after a short warm-up; medians over
the rounds are reported with the CPU time wrk and each server used (a share of one core: wrk runs on the same
two cores as the server, so its share is taken from the server).

``--baseline-tree DIR`` adds a third server: the service from another source tree (an export of an older
commit, e.g. ``git archive <commit> | tar -x -C DIR``), measured in the same rounds, for before/after figures.

Needs wrk: on Debian/Ubuntu ``sudo apt-get update && sudo apt-get install -y wrk`` (the package ``wrk``);
without it the script prints SKIPPED and exits 0.

    .venv/bin/python bench/http/bench_floor.py [--rounds 3] [--duration 5] [--warmup 1] [--baseline-tree DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from run_http_bench import (  # noqa: E402  (the same store, bodies, server handling and wrk runner)
    NAME,
    ROOT,
    SERVER_ENV,
    Scenario,
    Server,
    cpu_model,
    free_port,
    load_average,
    measure,
    post,
    prepare_store,
    write_bodies,
)

SCENARIOS = [Scenario("single record, 16 connections", 1, 16), Scenario("single record, 1 connection", 1, 1)]
UVICORN_FLAGS = ["--host", "127.0.0.1", "--workers", "1", "--no-access-log", "--log-level", "warning"]
THROUGHPUT_GOAL = 0.60     # service requests/s at 16 connections as a share of the floor's
LATENCY_GOAL = 1.5         # service p50 at 1 connection as a multiple of the floor's


def service_server(label: str, tree: Path, store: Path) -> Server:
    port = free_port()
    env = {**os.environ, **SERVER_ENV, "PYTHONPATH": str(tree), "SEGSCORE_STORE_DIR": str(store)}
    return Server(label, ["--factory", "service.app:create_app", "--port", str(port), *UVICORN_FLAGS], env,
                  f"http://127.0.0.1:{port}/v1/segmentations/{NAME}/assign", f"http://127.0.0.1:{port}/healthz",
                  cwd=tree)      # ``python -m`` puts the working directory first on sys.path


def floor_server() -> Server:
    port = free_port()
    env = {**os.environ, **SERVER_ENV, "PYTHONPATH": str(ROOT)}
    return Server("floor", ["floor_app:app", "--app-dir", str(HERE), "--port", str(port), *UVICORN_FLAGS], env,
                  f"http://127.0.0.1:{port}/v1/segmentations/{NAME}/assign", f"http://127.0.0.1:{port}/healthz")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rounds", type=int, default=3, help="alternating rounds (at least 2; default 3)")
    parser.add_argument("--duration", type=float, default=5.0, help="seconds per measured wrk run (default 5)")
    parser.add_argument("--warmup", type=float, default=1.0, help="seconds of warm-up before each run (default 1)")
    parser.add_argument("--baseline-tree", type=Path, help="also measure the service from this source tree")
    args = parser.parse_args()
    args.rounds = max(2, args.rounds)
    if shutil.which("wrk") is None:
        print("SKIPPED: wrk is not installed. On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk")
        return 0

    started = time.monotonic()
    workdir = Path(tempfile.mkdtemp(prefix="segscore-floor-bench-"))
    servers: list[Server] = []
    samples: dict[tuple[str, str], list[dict]] = {}
    try:
        print("fitting the bundle and writing request bodies ...", flush=True)
        store = workdir / "store"
        prepare_store(store)
        body = write_bodies(workdir)[1]
        servers.append(floor_server())
        servers.append(service_server("segscore", ROOT, store))
        if args.baseline_tree:
            servers.append(service_server("before", args.baseline_tree.resolve(), store))
        for server in servers:
            server.wait_ready()
        for server in servers:
            status, answer = post(server.url, body.read_bytes())
            assert status == 200 and len(answer["results"]) == 1, (server.label, status, answer)
        print("check: every server answers 200 with one result", flush=True)
        for round_number in range(args.rounds):
            turn = round_number % len(servers)
            order = servers[turn:] + servers[:turn]       # each server goes first in some round
            for scenario in SCENARIOS:
                for server in order:
                    print(f"round {round_number + 1}/{args.rounds}: {server.label:8s} {scenario.key} "
                          f"({args.duration:g} s) ...", flush=True)
                    run = measure(server, body, scenario, args.duration, args.warmup)
                    run["cpu_us"] = run["server_cpu_s"] / max(1, run["requests"]) * 1e6
                    samples.setdefault((scenario.key, server.label), []).append(run)
    finally:
        for server in servers:
            server.stop()
        shutil.rmtree(workdir, ignore_errors=True)

    def median(scenario: Scenario, label: str, key: str) -> float:
        return statistics.median(run[key] for run in samples[(scenario.key, label)])

    labels = [server.label for server in servers]
    print()
    print("== single-record assign vs the framework floor (uvicorn, 1 worker, access log off, 127.0.0.1; "
          "wrk -t1, Lua POST) ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average now {load_average()}; "
          f"server env {SERVER_ENV}")
    print(f"{args.rounds} alternating rounds; each run {args.duration:g} s after a {args.warmup:g} s warm-up; "
          "medians over the rounds")
    header = (f"{'scenario':32s} {'server':9s} {'req/s':>9s} {'p50 ms':>8s} {'p99 ms':>8s} {'failed':>6s} "
              f"{'wrk CPU':>8s} {'srv CPU':>8s} {'srv us/req':>10s}")
    print(header)
    print("-" * len(header))
    for scenario in SCENARIOS:
        for label in labels:
            failed = sum(run["failed"] for run in samples[(scenario.key, label)])
            print(f"{scenario.key:32s} {label:9s} {median(scenario, label, 'rps'):9,.0f} "
                  f"{median(scenario, label, 'p50_us') / 1000:8.3f} {median(scenario, label, 'p99_us') / 1000:8.3f} "
                  f"{failed:6d} {median(scenario, label, 'wrk_cpu_share'):7.0%} "
                  f"{median(scenario, label, 'server_cpu_share'):7.0%} {median(scenario, label, 'cpu_us'):10.0f}")
    print("(wrk CPU / srv CPU: CPU time used by wrk / by the server process during the run, as a share of one core;")
    print(" srv us/req: server CPU time per answered request, the figure least moved by other load on the machine)")
    print()
    busy, idle = SCENARIOS
    print("-- goals (medians of the same rounds)")
    for label in labels[1:]:
        share = median(busy, label, "rps") / median(busy, "floor", "rps")
        ratio = median(idle, label, "p50_us") / median(idle, "floor", "p50_us")
        print(f"{label:9s} requests/s at 16 connections: {share:6.1%} of the floor's "
              f"(goal >= {THROUGHPUT_GOAL:.0%}: {'met' if share >= THROUGHPUT_GOAL else 'NOT met'})")
        print(f"{label:9s} p50 at 1 connection: {ratio:5.2f}x the floor's "
              f"(goal <= {LATENCY_GOAL:g}x: {'met' if ratio <= LATENCY_GOAL else 'NOT met'})")
        cpu_share = median(busy, "floor", "cpu_us") / median(busy, label, "cpu_us")
        print(f"{label:9s} server CPU per request at 16 connections: floor's / {label}'s = {cpu_share:6.1%}")
        if label != "segscore":
            gain = median(busy, "segscore", "rps") / median(busy, label, "rps")
            cpu_gain = median(busy, label, "cpu_us") / median(busy, "segscore", "cpu_us")
            print(f"segscore vs {label}: {gain:5.2f}x the requests/s, {cpu_gain:5.2f}x less server CPU per request "
                  "at 16 connections")
    failed = sum(run["failed"] for runs in samples.values() for run in runs)
    print(f"failed requests (non-2xx, socket errors, timeouts) over all runs: {failed}")
    print(f"total time {time.monotonic() - started:.0f} s; servers stopped")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
