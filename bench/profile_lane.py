"""Benchmark (not a test): in-process CPU per single-record assign request, the assign lane against the
framework floor, as direct ASGI calls (no sockets, no HTTP parsing), and where the lane's time goes.

The same bundle and the same single-record body as the HTTP benchmarks (bench/http/run_http_bench.py: make_blobs
100,000 x 20, StandardScaler -> PCA(5) -> KMeans(8)); the service app (``create_app``, its lifespan run, so the
garbage-collector settings, the warmed cache and live drift are as in a server) and the floor
(bench/http/floor_app.py) each get the same ASGI scope, body and headers as wrk sends. What this leaves out is
what both servers share: uvicorn's HTTP parsing and socket writes. So the ratio here is the web-layer part of
the HTTP goal, measured without the noise of the load generator on the same cores.

Both apps run on the event loop uvicorn would give them (uvloop when installed). Timing: ``--rounds`` rounds
of ``--calls`` requests per app, the apps alternating within each round; CPU time of the process
(``time.process_time``: every thread, as the HTTP bench's server CPU is) and wall time, medians over the rounds.
Then a cProfile of ``--profile-calls`` lane requests: the top entries by cumulative and by own time (the
profiler inflates every call; read the shares, not the times).

``--cold``: also time each request after evicting the CPU caches (a pass over a 4 MiB array and over 20,000
small dicts, the work of other processes between two requests of a server at one connection), minus the
eviction's own CPU time measured alone in the same rounds: how much each app's request costs when its code and
data are no longer cached.

``--steps``: also time each step of scoring one record (``assign_one``) in a warm loop and right after an
eviction: where the cold-cache cost of a server's request goes.

    PYTHONPATH=$PWD .venv/bin/python bench/profile_lane.py [--rounds 15] [--calls 2000] [--profile-calls 3000] [--cold]
        [--steps]
"""

from __future__ import annotations

import argparse
import asyncio
import cProfile
import io
import os
import pstats
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE / "http"))
os.environ.setdefault("OMP_NUM_THREADS", "1")          # as the HTTP bench's servers (docker/Dockerfile)
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from bench.machine import cpu_model, load_average  # noqa: E402
from floor_app import app as floor_app  # noqa: E402
from run_http_bench import NAME, prepare_store, write_bodies  # noqa: E402
from service.app import create_app  # noqa: E402
from service.settings import Settings  # noqa: E402

PATH = f"/v1/segmentations/{NAME}/assign"


def asgi_call(app, body: bytes):
    """An awaitable factory: one POST of ``body`` as wrk's post.lua sends it; returns the status."""
    scope = {"type": "http", "asgi": {"version": "3.0", "spec_version": "2.3"}, "http_version": "1.1",
             "method": "POST", "scheme": "http", "path": PATH, "raw_path": PATH.encode(), "query_string": b"",
             "root_path": "", "server": ("127.0.0.1", 8000), "client": ("127.0.0.1", 5000),
             "headers": [(b"host", b"127.0.0.1:8000"), (b"content-length", str(len(body)).encode()),
                         (b"content-type", b"application/json")]}
    message = {"type": "http.request", "body": body, "more_body": False}
    status = [0]

    async def receive():
        return message

    async def send(sent):
        if sent["type"] == "http.response.start":
            status[0] = sent["status"]

    async def call() -> int:
        await app(dict(scope), receive, send)
        return status[0]

    return call


async def run_lifespan(app):
    """Start ``app``'s lifespan (as uvicorn does); returns the coroutine that shuts it down."""
    inbox: asyncio.Queue = asyncio.Queue()
    outbox: asyncio.Queue = asyncio.Queue()
    task = asyncio.create_task(app({"type": "lifespan", "asgi": {"version": "3.0"}, "state": {}},
                                   inbox.get, outbox.put))
    await inbox.put({"type": "lifespan.startup"})
    answer = await outbox.get()
    assert answer["type"] == "lifespan.startup.complete", answer

    async def stop() -> None:
        await inbox.put({"type": "lifespan.shutdown"})
        await outbox.get()
        await task

    return stop


async def timed(call, calls: int) -> tuple[float, float]:
    """(CPU seconds, wall seconds) per request over ``calls`` requests."""
    cpu, wall = time.process_time(), time.perf_counter()
    for _ in range(calls):
        await call()
    return (time.process_time() - cpu) / calls, (time.perf_counter() - wall) / calls


EVICT_ARRAY = None
EVICT_OBJECTS = None


def evict() -> None:
    """Touch 4 MiB of array and 20,000 small dicts: what other processes leave in the caches between requests."""
    global EVICT_ARRAY, EVICT_OBJECTS
    if EVICT_ARRAY is None:
        import numpy as np
        EVICT_ARRAY = np.ones(4 * 1024 * 1024 // 8)
        EVICT_OBJECTS = [{"a": i, "b": str(i)} for i in range(20_000)]
    EVICT_ARRAY.sum()
    sum(len(item) for item in EVICT_OBJECTS)


async def timed_cold(call, calls: int) -> float:
    """CPU seconds per request, each request after ``evict()`` (the eviction's own time included)."""
    cpu = time.process_time()
    for _ in range(calls):
        evict()
        await call()
    return (time.process_time() - cpu) / calls


def scoring_steps(compiled, body: bytes, rounds: int) -> None:
    """Time each step of scoring one record (``assign_one``) in a warm loop and right after ``evict()``: what a
    step costs when other work has run since its last call, as between two requests of a server."""
    import math
    from array import array

    import orjson

    from service.core.assign import assign_one

    row = tuple(orjson.loads(body)["records"][0][name] for name in compiled.features)
    form = compiled.single_record_form
    values = array("d", row)
    values.append(1.0)
    product = form.product.dot(values)
    out = product.tolist()
    k, d = form.k, form.d

    def buffer():
        built = array("d", row)
        built.append(1.0)

    steps = [
        ("nothing (the timer alone)", lambda: None),
        ("buffer of the values (array.array)", buffer),
        ("the product (ndarray.dot on the buffer)", lambda: form.product.dot(values)),
        ("product.tolist()", product.tolist),
        ("math.hypot of the d coordinates", lambda: math.hypot(*out[k:k + d])),
        ("the k squared distances (list comprehension)",
         lambda: [1e3 - 2.0 * cross + norm for cross, norm in zip(out[:k], form.centroid_sq_norms)]),
        ("assign_one, whole", lambda: assign_one(compiled, row)),
    ]
    warm: dict[str, list[float]] = {label: [] for label, _ in steps}
    cold: dict[str, list[float]] = {label: [] for label, _ in steps}
    for _ in range(rounds):
        for label, step in steps:
            started = time.perf_counter()
            for _ in range(2000):
                step()
            warm[label].append((time.perf_counter() - started) / 2000)
            spent = 0.0
            for _ in range(200):
                evict()
                started = time.perf_counter()
                step()
                spent += time.perf_counter() - started
            cold[label].append(spent / 200)
    print()
    print(f"scoring one record, step by step ({rounds} rounds; wall time per call, medians): warm loop / right "
          "after an eviction")
    for label, _ in steps:
        print(f"  {label:48s} {statistics.median(warm[label]) * 1e6:6.2f} us / "
              f"{statistics.median(cold[label]) * 1e6:6.2f} us")


async def main_async(args) -> None:
    workdir = Path(tempfile.mkdtemp(prefix="segscore-profile-lane-"))
    try:
        print("fitting the bundle and writing the body ...", flush=True)
        store = workdir / "store"
        prepare_store(store)
        body = write_bodies(workdir)[1].read_bytes()
        service = create_app(Settings(store_dir=store))
        stop = await run_lifespan(service)
        try:
            calls = {"floor": asgi_call(floor_app, body), "segscore": asgi_call(service, body)}
            for label, call in calls.items():
                assert await call() == 200, label
                await timed(call, 300)                                  # warm-up
            samples: dict[str, list[tuple[float, float]]] = {label: [] for label in calls}
            for round_number in range(args.rounds):
                order = list(calls) if round_number % 2 == 0 else list(calls)[::-1]
                for label in order:
                    samples[label].append(await timed(calls[label], args.calls))
            print()
            print(f"machine: {cpu_model()}, {os.cpu_count()} logical CPUs; load average {load_average()}")
            print(f"{args.rounds} alternating rounds x {args.calls} direct ASGI calls per app; single-record body "
                  f"of {len(body)} bytes; medians")
            cpu = {label: statistics.median(s[0] for s in runs) * 1e6 for label, runs in samples.items()}
            wall = {label: statistics.median(s[1] for s in runs) * 1e6 for label, runs in samples.items()}
            for label in calls:
                print(f"{label:9s} CPU {cpu[label]:7.1f} us per request   wall {wall[label]:7.1f} us")
            print(f"segscore / floor: CPU {cpu['segscore'] / cpu['floor']:.2f}x, "
                  f"wall {wall['segscore'] / wall['floor']:.2f}x")
            if args.cold:
                cold: dict[str, list[float]] = {label: [] for label in calls}
                alone: list[float] = []
                calls_cold = max(50, args.calls // 10)
                for round_number in range(args.rounds):
                    started = time.process_time()
                    for _ in range(calls_cold):
                        evict()
                    alone.append((time.process_time() - started) / calls_cold)
                    order = list(calls) if round_number % 2 == 0 else list(calls)[::-1]
                    for label in order:
                        cold[label].append(await timed_cold(calls[label], calls_cold))
                base = statistics.median(alone)
                cold_cpu = {label: (statistics.median(runs) - base) * 1e6 for label, runs in cold.items()}
                print(f"after a cache eviction ({args.rounds} rounds x {calls_cold} requests; the eviction's own "
                      f"{base * 1e6:.0f} us subtracted):")
                for label in calls:
                    print(f"{label:9s} CPU {cold_cpu[label]:7.1f} us per request")
                print(f"segscore / floor after an eviction: CPU {cold_cpu['segscore'] / cold_cpu['floor']:.2f}x")

            if args.steps:
                loaded, _ = await service.state.store.serving(NAME, None)
                scoring_steps(loaded.compiled, body, args.rounds)

            profiler = cProfile.Profile(time.process_time)
            call = calls["segscore"]
            profiler.enable()
            for _ in range(args.profile_calls):
                await call()
            profiler.disable()
            stats = pstats.Stats(profiler, stream=(out := io.StringIO()))
            total_calls = stats.total_calls
            stats.strip_dirs()
            print()
            print(f"cProfile of {args.profile_calls} lane requests: {total_calls / args.profile_calls:.0f} "
                  "Python-level calls per request")
            for key in ("cumulative", "tottime"):
                out.seek(0)
                out.truncate()
                stats.sort_stats(key).print_stats(args.top)
                print(f"-- top {args.top} by {key}")
                print(out.getvalue().split("ncalls", 1)[1].join(("   ncalls", "")).rstrip())
        finally:
            await stop()
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=15, help="alternating rounds (default 15)")
    parser.add_argument("--calls", type=int, default=2000, help="requests per app per round (default 2000)")
    parser.add_argument("--profile-calls", type=int, default=3000, help="lane requests profiled (default 3000)")
    parser.add_argument("--top", type=int, default=20, help="profile entries shown per ordering (default 20)")
    parser.add_argument("--cold", action="store_true", help="also time requests after a cache eviction")
    parser.add_argument("--steps", action="store_true",
                        help="also time each step of scoring one record, warm and after a cache eviction")
    args = parser.parse_args()
    try:                    # the event loop uvicorn runs the servers on (its loop="auto" takes uvloop when installed)
        import uvloop
        loop_factory = uvloop.new_event_loop
    except ImportError:
        loop_factory = None
    with asyncio.Runner(loop_factory=loop_factory) as runner:
        runner.run(main_async(args))


if __name__ == "__main__":
    main()
