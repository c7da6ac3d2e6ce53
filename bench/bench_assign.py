"""Benchmark (not a test): the assign fast path against scikit-learn's Pipeline.predict of the same fitted objects.

Data: 100,000 x 20 synthetic records, 8 blobs (sklearn.datasets.make_blobs, random_state=0). The bundle is
fitted by the service core (service.core.fit.fit_bundle): median imputer -> StandardScaler -> PCA(5) ->
KMeans(8), k and components fixed. The reference pipeline is sklearn.pipeline.Pipeline built from the SAME
fitted imputer, scaler, PCA and KMeans objects.

Single record (the way a web route gets it: one JSON object, already parsed into a dict):
    fast path     service.core.frame.batch_from_json (dict -> checked 1x20 matrix) + impute + assign
    + results     the same plus the route's checks and result building (service.api.assign)
    sklearn       Pipeline.predict on a prebuilt 1-row DataFrame (copies of the fitted steps whose imputer
                  knows the column names, as a pipeline fitted on a DataFrame would), and the same with
                  the DataFrame built from the dict inside the timing
Batch of 100,000 (numpy float64, C order):
    fast path     impute + assign, default BLAS threads and BLAS/OpenMP limited to 1 thread (threadpoolctl)
    sklearn       Pipeline.predict, default threads and limited to 1 thread
    bare X @ A    one product with the 20x5 folded scaler+PCA matrix: the speed limit

Candidates run interleaved (one call of each in turn, many rounds), so load from other processes hits
all of them alike; medians are reported. Targets: single record >= 60x faster than Pipeline.predict on a
1-row DataFrame (the fast path, and the same with the route's checks and result dicts); batch >= 2x faster than the one-thread Pipeline.predict and >= 0.5x the speed of bare X @ A.

    python bench/bench_assign.py [--rounds 40] [--single-calls 100] [--rows 100000]
"""

from __future__ import annotations

import argparse
import copy
import os
import platform
import statistics
import time
from typing import Callable

import numpy as np
import pandas as pd
import sklearn
from sklearn.datasets import make_blobs
from sklearn.pipeline import Pipeline
from threadpoolctl import threadpool_info, threadpool_limits

from machine import cpu_model, load_average  # bench/ is on sys.path when a script here runs
from service.api.assign import build_results, run_assignment, split_good_rows
from service.api.payload import too_many_missing
from service.core.assign import assign, compile_bundle, impute
from service.core.bundle import FitConfig
from service.core.fit import fit_bundle
from service.core.frame import batch_from_json
from service.store import LoadedVersion

N_FEATURES, N_BLOBS, N_COMPONENTS = 20, 8, 5
FEATURES = [f"f{j:02d}" for j in range(N_FEATURES)]


def interleaved(candidates: dict[str, Callable[[], object]], rounds: int, calls: int = 1) -> dict[str, tuple[float, float]]:
    """Median wall seconds and median CPU seconds of the calling thread per call of each candidate. The thread's
    CPU time is not inflated when other processes take the core, but it leaves out BLAS/OpenMP helper
    threads (so it understates multi-threaded calls). Each round runs ``calls`` timed calls of every candidate
    in turn."""
    wall: dict[str, list[int]] = {name: [] for name in candidates}
    cpu: dict[str, list[int]] = {name: [] for name in candidates}
    for fn in candidates.values():           # warm-up
        fn()
    clock, cpu_clock = time.perf_counter_ns, time.thread_time_ns
    for _ in range(rounds):
        for name, fn in candidates.items():
            for _ in range(calls):
                start, cpu_start = clock(), cpu_clock()
                fn()
                cpu[name].append(cpu_clock() - cpu_start)
                wall[name].append(clock() - start)
    return {name: (statistics.median(wall[name]) / 1e9, statistics.median(cpu[name]) / 1e9) for name in candidates}


def fmt_time(seconds: float) -> str:
    return f"{seconds * 1e6:9.1f} us" if seconds < 1e-3 else f"{seconds * 1e3:9.2f} ms"


def verdict(ratio: float, target: float) -> str:
    return f"{ratio:6.2f}x  (target >= {target:g}x: {'met' if ratio >= target else 'NOT met'})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--rounds", type=int, default=40, help="rounds of the batch comparison")
    parser.add_argument("--single-calls", type=int, default=100, help="timed calls per candidate per round (single)")
    parser.add_argument("--single-rounds", type=int, default=40)
    args = parser.parse_args()

    values, _ = make_blobs(n_samples=args.rows, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
    values = np.ascontiguousarray(values)
    started = time.perf_counter()
    bundle = fit_bundle(values, FitConfig(features=FEATURES, scaling="standard", components=N_COMPONENTS,
                                          k_min=N_BLOBS, k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
    fit_seconds = time.perf_counter() - started
    compiled = compile_bundle(bundle)
    loaded = LoadedVersion("bench", 1, bundle, compiled)
    pipeline = Pipeline([("impute", bundle.imputer), ("scale", bundle.scaler), ("pca", bundle.pca),
                         ("cluster", bundle.clusterer)])
    # For DataFrame input: copies of the same fitted steps whose first step knows the column names, as
    # in a pipeline fitted on a DataFrame (otherwise scikit-learn warns on every call).
    frame_pipeline = copy.deepcopy(pipeline)
    frame_pipeline.steps[0][1].feature_names_in_ = np.asarray(FEATURES, dtype=object)

    # Correctness first: the fast path and Pipeline.predict agree on every record.
    fast = assign(compiled, values)
    reference = pipeline.predict(values)
    agree = int(np.sum(fast.segment == reference))

    print("== assign benchmark (in-process) ==")
    print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average at start {load_average()}")
    blas = [f"{i['internal_api']} {i.get('version')} ({i['num_threads']} threads)" for i in threadpool_info()]
    print(f"python {platform.python_version()}, numpy {np.__version__}, scikit-learn {sklearn.__version__}, "
          f"pandas {pd.__version__}; thread pools: {', '.join(blas)}; "
          f"OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE', '(unset)')}")
    print(f"data: {args.rows:,} x {N_FEATURES} (make_blobs, {N_BLOBS} centres, random_state=0); bundle: "
          f"StandardScaler -> PCA({N_COMPONENTS}) -> KMeans({N_BLOBS}), fitted by the service core in {fit_seconds:.1f} s")
    print(f"labels: fast path == Pipeline.predict on {agree:,} of {args.rows:,} records")
    print()

    # ---------------------------------------------------------------- single record
    record = dict(zip(FEATURES, map(float, values[12345 % args.rows])))
    frame = pd.DataFrame([record])

    def fast_single() -> None:
        batch = batch_from_json([record], FEATURES, None)
        filled = impute(compiled, batch.values)[0] if batch.may_have_nan else batch.values   # as the route does
        assign(compiled, filled)

    def fast_single_results() -> None:
        batch = batch_from_json([record], FEATURES, None)
        too_many_missing(batch, FEATURES)
        rows, _ = split_good_rows(batch, False)
        result, missing = run_assignment(loaded, batch.values, may_have_nan=batch.may_have_nan)
        build_results(loaded, {}, batch.ids, rows, result, missing)

    row = values[:1].copy()
    single = interleaved({
        "fast path (dict -> matrix, impute, assign)": fast_single,
        "fast path + checks + result dicts": fast_single_results,
        "Pipeline.predict, prebuilt 1-row DataFrame": lambda: frame_pipeline.predict(frame),
        "Pipeline.predict, DataFrame built from the dict": lambda: frame_pipeline.predict(pd.DataFrame([record])),
        "Pipeline.predict, 1x20 numpy": lambda: pipeline.predict(row),
    }, rounds=args.single_rounds, calls=args.single_calls)
    # The same with BLAS/OpenMP limited to one thread (as the server runs): on a loaded machine the idle
    # helper threads of a default-threads predict spin on the other core and inflate the reference.
    with threadpool_limits(1):
        single_one_thread = interleaved({
            "fast path (dict -> matrix, impute, assign)": fast_single,
            "fast path + checks + result dicts": fast_single_results,
            "Pipeline.predict, prebuilt 1-row DataFrame": lambda: frame_pipeline.predict(frame),
        }, rounds=args.single_rounds, calls=args.single_calls)
    base = single["Pipeline.predict, prebuilt 1-row DataFrame"]
    base_one_thread = single_one_thread["Pipeline.predict, prebuilt 1-row DataFrame"]
    print(f"-- single record: median of {args.single_rounds * args.single_calls} calls each, interleaved")
    print(f"{'candidate':52s} {'wall':>12s} {'CPU':>12s}   speed-up vs Pipeline.predict (prebuilt DataFrame), wall / CPU")
    print("(CPU: of the calling thread; medians)")
    for name, (seconds, cpu_seconds) in single.items():
        print(f"{name:52s} {fmt_time(seconds)} {fmt_time(cpu_seconds)}   {base[0] / seconds:6.2f}x / {base[1] / cpu_seconds:6.2f}x")
    print("the same, BLAS/OpenMP limited to 1 thread (threadpoolctl), speed-up vs the 1-thread Pipeline.predict:")
    for name, (seconds, cpu_seconds) in single_one_thread.items():
        print(f"{name + ', 1 thread':52s} {fmt_time(seconds)} {fmt_time(cpu_seconds)}   "
              f"{base_one_thread[0] / seconds:6.2f}x / {base_one_thread[1] / cpu_seconds:6.2f}x")
    print()

    # ---------------------------------------------------------------- batch
    affine = np.ascontiguousarray(compiled.affine)           # (20, 5): scaler and PCA folded into one matrix

    def fast_batch() -> None:
        filled, _ = impute(compiled, values)
        assign(compiled, filled)

    # Two groups, each interleaved: one thread first, then default threads. Mixing them would let the idle
    # BLAS threads of a default-threads call spin on the second core during the next one-thread call.
    batch: dict[str, tuple[float, float]] = {}
    for setting, limit in (("1 thread", 1), ("default threads", None)):
        with threadpool_limits(limit):
            group = interleaved({
                f"fast path, {setting}": fast_batch,
                f"Pipeline.predict, {setting}": lambda: pipeline.predict(values),
                f"bare X @ A, {setting}": lambda: values @ affine,
            }, rounds=args.rounds)
        batch.update(group)
    print(f"-- batch of {args.rows:,} records: median of {args.rounds} calls each, interleaved within each thread setting")
    print(f"{'candidate':52s} {'wall':>12s} {'CPU':>12s}   {'records/s (wall)':>16s}")
    print("(CPU: of the calling thread only, so BLAS/OpenMP helper threads of default-threads calls are not counted)")
    for name, (seconds, cpu_seconds) in batch.items():
        print(f"{name:52s} {fmt_time(seconds)} {fmt_time(cpu_seconds)}   {args.rows / seconds:16,.0f}")
    print()

    print("-- targets (wall-time medians; calling-thread CPU ratio in brackets, meaningful for 1-thread rows)")

    def ratio(slow: tuple[float, float], fast: tuple[float, float]) -> tuple[float, float]:
        return slow[0] / fast[0], slow[1] / fast[1]

    def line(text: str, ratios: tuple[float, float], target: float) -> None:
        print(f"{text:72s} {verdict(ratios[0], target)}  [CPU {ratios[1]:.2f}x]")

    line("single record: fast path vs Pipeline.predict (prebuilt 1-row DataFrame)",
         ratio(base, single["fast path (dict -> matrix, impute, assign)"]), 60)
    line("single record: fast path + checks + result dicts vs the same",
         ratio(base, single["fast path + checks + result dicts"]), 60)
    line("single record, 1 thread: fast path vs Pipeline.predict (1-row DataFrame)",
         ratio(base_one_thread, single_one_thread["fast path (dict -> matrix, impute, assign)"]), 60)
    line("single record, 1 thread: fast path + checks + result dicts vs the same",
         ratio(base_one_thread, single_one_thread["fast path + checks + result dicts"]), 60)
    for setting in ("1 thread", "default threads"):
        line(f"batch: fast path ({setting}) vs Pipeline.predict (1 thread)",
             ratio(batch["Pipeline.predict, 1 thread"], batch[f"fast path, {setting}"]), 2)
    for setting in ("1 thread", "default threads"):
        line(f"batch: fast path speed as a share of bare X @ A ({setting})",
             ratio(batch[f"bare X @ A, {setting}"], batch[f"fast path, {setting}"]), 0.5)
    print(f"load average at end {load_average()}")


if __name__ == "__main__":
    main()
