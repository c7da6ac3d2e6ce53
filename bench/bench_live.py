"""Benchmark (not a test): the assign path with live drift on vs off, side by side in one run.

In-process (the same bundle as bench_assign.py: 100,000 x 20 make_blobs records, StandardScaler -> PCA(5) ->
KMeans(8), fitted by the service core):
    single record   the route's work for one JSON record (dict -> checked matrix, checks, impute + assign,
                    result dicts), then the live hook: ``LiveRecorder.observe`` (on, with its background thread
                    tallying and flushing to a local store as in the server) or ``LiveOff.observe`` (off)
    batch           impute + assign of 100,000 records (1 BLAS thread), then the same hook
    background      what the recorder's thread spends per record later, off the request path: ``tally`` of
                    1,000 queued single records, and of one 100,000-record batch
Over HTTP: two ``segscore serve`` processes on one local store, SEGSCORE_LIVE_DRIFT=true and false, asked in
turn (alternating which goes first each round): single-record and 1,000-record assigns.

Candidates run interleaved; medians are reported. Target (issue 14): on within 5 % of off. The in-process runs
use the server's garbage-collector setting (``gc.freeze()`` and ``SEGSCORE_GC_GEN0_THRESHOLD``, as
``service.app`` does at start-up): queued references survive a few hundred milliseconds, which the default
threshold of 700 would walk over and over.

    python bench/bench_live.py [--rounds 20] [--single-calls 200] [--http-rounds 6] [--http-calls 100]
"""

from __future__ import annotations

import argparse
import gc
import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx2 as httpx
import numpy as np
from sklearn.datasets import make_blobs
from threadpoolctl import threadpool_limits

from bench_assign import FEATURES, N_BLOBS, N_COMPONENTS, N_FEATURES, fmt_time, interleaved
from machine import cpu_model, load_average  # bench/ is on sys.path when a script here runs
from service.api.assign import build_results, run_assignment, split_good_rows
from service.api.payload import too_many_missing
from service.core.assign import assign, compile_bundle, impute
from service.core.bundle import FitConfig
from service.core.fit import fit_bundle
from service.core.frame import batch_from_json
from service.live.counts import tally
from service.live.recorder import LiveOff, LiveRecorder, layout_of
from service.settings import Settings
from service.store import FilesystemStore, LoadedVersion


def in_process(args) -> None:
    values, _ = make_blobs(n_samples=args.rows, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    values = np.ascontiguousarray(values)
    bundle = fit_bundle(values, FitConfig(features=FEATURES, scaling="standard", components=N_COMPONENTS,
                                          k_min=N_BLOBS, k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
    compiled = compile_bundle(bundle)
    loaded = LoadedVersion("bench", 1, bundle, compiled)
    with tempfile.TemporaryDirectory() as folder:
        on = LiveRecorder(FilesystemStore(Path(folder) / "store"), bucket_seconds=300, flush_seconds=2,
                          retention_days=30)
        on.start()                       # the background tally and flush run during the timings, as in a server
        off = LiveOff()
        record = dict(zip(FEATURES, map(float, values[12345 % args.rows])))

        def single(live) -> None:
            batch = batch_from_json([record], FEATURES, None)
            too_many_missing(batch, FEATURES)
            rows, _ = split_good_rows(batch, False)
            result, missing = run_assignment(loaded, batch.values)
            build_results(loaded, {}, batch.ids, rows, result, missing)
            live.observe(loaded, batch.values, result)

        def batch(live) -> None:
            filled, _ = impute(compiled, values)
            live.observe(loaded, values, assign(compiled, filled))

        print(f"-- in-process, single record: median of {args.rounds * args.single_calls} calls each, interleaved")
        singles = interleaved({"live drift off": lambda: single(off), "live drift on": lambda: single(on)},
                              rounds=args.rounds, calls=args.single_calls)
        report(singles)
        with threadpool_limits(1):
            print(f"-- in-process, batch of {args.rows:,} (1 BLAS thread): median of {args.rounds} calls each, "
                  "interleaved")
            batches = interleaved({"live drift off": lambda: batch(off), "live drift on": lambda: batch(on)},
                                  rounds=args.rounds)
            report(batches)
            on.stop()
            layout = layout_of(loaded)
            one = assign(compiled, values[:1])
            singles_values = np.repeat(values[:1], 1000, axis=0)
            thousand = assign(compiled, singles_values)
            whole = assign(compiled, values)
            fields = ("segment", "far", "off_plane", "residual")
            background = interleaved({
                "tally of 1,000 queued single records": lambda: tally(layout, singles_values,
                                                                     *(getattr(thousand, f) for f in fields)),
                f"tally of one {args.rows:,}-record batch": lambda: tally(layout, values,
                                                                         *(getattr(whole, f) for f in fields)),
                "tally of 1 record alone": lambda: tally(layout, values[:1], *(getattr(one, f) for f in fields)),
            }, rounds=args.rounds)
        print("-- background thread (off the request path), median per call; per record in brackets")
        for name, (seconds, _) in background.items():
            n = 1000 if "1,000" in name else args.rows if "batch" in name else 1
            print(f"{name:52s} {fmt_time(seconds)}   [{seconds / n * 1e6:.2f} us/record]")
        print()


def report(results: dict[str, tuple[float, float]]) -> None:
    for name, (seconds, cpu_seconds) in results.items():
        print(f"{name:52s} wall {fmt_time(seconds)}  CPU {fmt_time(cpu_seconds)}")
    (off, off_cpu), (on, on_cpu) = results["live drift off"], results["live drift on"]
    print(f"{'on / off':52s} wall {on / off:9.3f}x    CPU {on_cpu / off_cpu:9.3f}x   (target <= 1.05)")
    print()


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def start_server(store: Path, live: bool, log: Path) -> tuple[subprocess.Popen, str]:
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")}
    env["SEGSCORE_LIVE_DRIFT"] = "true" if live else "false"
    segscore = Path(sys.executable).with_name("segscore")
    process = subprocess.Popen([str(segscore), "serve", "--store", str(store), "--port", str(port)],
                               stdout=log.open("w"), stderr=subprocess.STDOUT, env=env)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{base}/readyz", timeout=2).status_code == 200:
                return process, base
        except httpx.HTTPError:
            time.sleep(0.2)
    process.kill()
    raise SystemExit(f"server did not start; see {log}")


def over_http(args) -> None:
    values, _ = make_blobs(n_samples=20_000, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    records = [dict(zip(FEATURES, map(float, row))) for row in values]
    with tempfile.TemporaryDirectory() as folder:
        store = Path(folder) / "store"
        # The version is stored before either server starts (neither has served a fit: the same memory state).
        bundle = fit_bundle(values, FitConfig(features=FEATURES, scaling="standard", components=N_COMPONENTS,
                                              k_min=N_BLOBS, k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
        FilesystemStore(store).save_version("bench", bundle, make_live=True)
        servers = {}
        try:
            for live in (True, False):
                servers[live] = start_server(store, live, Path(folder) / f"server-{live}.log")
            clients = {live: httpx.Client(base_url=base, timeout=120) for live, (_, base) in servers.items()}
            single = {"records": records[:1]}
            thousand = {"records": records[:1000]}
            for body in (single, thousand):        # warm-up: loads the version on both
                for live, client in clients.items():
                    for _ in range(5):
                        assert client.post("/v1/segmentations/bench/assign", json=body).status_code == 200
            for label, body, calls in (("1 record", single, args.http_calls),
                                       ("1,000 records", thousand, max(5, args.http_calls // 10))):
                times = {True: [], False: []}
                for r in range(args.http_rounds):
                    for live in ((True, False) if r % 2 else (False, True)):
                        for _ in range(calls):
                            started = time.perf_counter()
                            answer = clients[live].post("/v1/segmentations/bench/assign", json=body)
                            times[live].append(time.perf_counter() - started)
                            assert answer.status_code == 200
                on, off = statistics.median(times[True]), statistics.median(times[False])
                print(f"-- HTTP, {label} per request: median of {len(times[True])} requests each, alternating")
                print(f"{'live drift off':52s} {fmt_time(off)}")
                print(f"{'live drift on':52s} {fmt_time(on)}")
                print(f"{'on / off':52s} {on / off:9.3f}x   (target <= 1.05)")
                print()
            for client in clients.values():
                client.close()
        finally:
            for process, _ in servers.values():
                process.send_signal(signal.SIGTERM)
                try:
                    process.wait(30)
                except subprocess.TimeoutExpired:
                    process.kill()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--rounds", type=int, default=20)
    parser.add_argument("--single-calls", type=int, default=200)
    parser.add_argument("--http-rounds", type=int, default=6)
    parser.add_argument("--http-calls", type=int, default=100)
    parser.add_argument("--no-http", action="store_true")
    parser.add_argument("--no-in-process", action="store_true")
    args = parser.parse_args()
    gc.freeze()
    gc.set_threshold(Settings().gc_gen0_threshold, *gc.get_threshold()[1:])      # as service.app at start-up
    print("== live drift on vs off ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average at start {load_average()}")
    if not args.no_in_process:
        in_process(args)
    if not args.no_http:
        over_http(args)
    print(f"load average at end {load_average()}")


if __name__ == "__main__":
    main()
