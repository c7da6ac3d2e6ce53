"""Load and isolation benchmark (not a test): a real uvicorn server on 127.0.0.1, driven by an async client.

Two parts, both bounded in time, both stopping by themselves:

1. ``assign p99 idle vs during a fit``: single-record assigns, one at a time, for ``--idle`` seconds; then a
   100,000 x 20 fit (CSV, k = 8, 5 components) is posted and single-record assigns continue, one at a time,
   until the fit answers. p50/p99 of each phase and their ratio (goal: p99 during the fit within 3x idle).
2. ``mixed load``: the peak rate of single-record assigns is measured (closed loop, 8 in flight, 5 s); then
   ``--duration`` seconds of open-loop traffic at ``--share`` (70 %) of it: single assigns, 1,000-row batches
   (a fifth of the load), a drift report every 5 s, and a 100,000-row fit started a third of the way in. Reported:
   requests and errors per route, p50/p99 per route idle and during the fit, lost drift reports (every report
   answered 200 must be in the stored list afterwards), and the server's resident memory at start and end.
   The fit's worker process is not part of the server's RSS (it is a separate process that exits).

    .venv/bin/python bench/load_mixed.py [--duration 60] [--idle 10] [--share 0.7] [--part both|isolation|mixed]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import httpx2 as httpx  # noqa: E402  (the httpx-compatible client the test extra installs)
import numpy as np  # noqa: E402
import orjson  # noqa: E402
from sklearn.datasets import make_blobs  # noqa: E402

from machine import cpu_model, load_average  # noqa: E402
from service.core.bundle import FitConfig  # noqa: E402
from service.core.fit import fit_bundle  # noqa: E402
from service.store import FilesystemStore  # noqa: E402

NAME = "bench"
N_ROWS, N_FEATURES, N_BLOBS, N_COMPONENTS = 100_000, 20, 8, 5
FEATURES = [f"f{j:02d}" for j in range(N_FEATURES)]
FIT_QUERY = f"?k={N_BLOBS}&components={N_COMPONENTS}&n_init=3&make_live=false"


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def wait_ready(url: str, server: subprocess.Popen, timeout: float = 120.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and server.poll() is None:
        try:
            if httpx.get(url, timeout=2).status_code == 200:
                return
        except httpx.HTTPError:
            time.sleep(0.2)
    raise RuntimeError("the server did not start")


def rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def percentiles(values: list[float]) -> str:
    if not values:
        return "n/a"
    ms = np.asarray(values) * 1000
    return f"p50 {np.percentile(ms, 50):7.2f} ms  p99 {np.percentile(ms, 99):7.2f} ms  (n={len(values)})"


class Data:
    def __init__(self) -> None:
        values, _ = make_blobs(n_samples=N_ROWS, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
        self.training = values
        fresh, _ = make_blobs(n_samples=5_000, n_features=N_FEATURES, centers=N_BLOBS, random_state=1)
        rows = [dict(zip(FEATURES, row)) for row in fresh.tolist()]
        self.singles = [orjson.dumps({"records": [row]}) for row in rows[:500]]
        self.batch = orjson.dumps({"records": rows[:1000]})
        self.drift = orjson.dumps({"records": rows[:2000]})
        header = ",".join(FEATURES)
        self.fit_csv = (header + "\n" + "\n".join(",".join(f"{v:.6f}" for v in row) for row in values)).encode()


def start_server(store: Path, port: int) -> subprocess.Popen:
    env = {**os.environ, "SEGSCORE_STORE_DIR": str(store), "PYTHONPATH": str(ROOT),
           "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    return subprocess.Popen([sys.executable, "-m", "uvicorn", "--factory", "service.app:create_app", "--host",
                             "127.0.0.1", "--port", str(port), "--no-access-log", "--log-level", "warning"],
                            cwd=ROOT, env=env, start_new_session=True, stdout=subprocess.DEVNULL)


JSON = {"content-type": "application/json"}


async def isolation(client: httpx.AsyncClient, data: Data, idle_seconds: float) -> dict:
    url = f"/v1/segmentations/{NAME}/assign"
    idle: list[float] = []
    end = time.monotonic() + idle_seconds
    i = 0
    while time.monotonic() < end:
        started = time.perf_counter()
        response = await client.post(url, content=data.singles[i % 500], headers=JSON)
        idle.append(time.perf_counter() - started)
        assert response.status_code == 200, response.text
        i += 1
    fit = asyncio.create_task(client.post(f"/v1/segmentations/{NAME}/fit{FIT_QUERY}", content=data.fit_csv,
                                          headers={"content-type": "text/csv"}, timeout=900))
    during: list[float] = []
    fit_started = time.monotonic()
    await asyncio.sleep(0.5)                   # the upload and parse; measure while the worker fits
    while not fit.done():
        started = time.perf_counter()
        response = await client.post(url, content=data.singles[i % 500], headers=JSON)
        during.append(time.perf_counter() - started)
        assert response.status_code == 200, response.text
        i += 1
    fit_response = await fit
    return {"idle": idle, "during": during, "fit_status": fit_response.status_code,
            "fit_seconds": time.monotonic() - fit_started}


async def peak_rate(client: httpx.AsyncClient, bodies: list[bytes], seconds: float = 5.0, in_flight: int = 8) -> float:
    """Closed-loop requests/s of assign calls with these bodies."""
    url = f"/v1/segmentations/{NAME}/assign"
    count = 0
    end = time.monotonic() + seconds

    async def loop(k: int) -> None:
        nonlocal count
        while time.monotonic() < end:
            await client.post(url, content=bodies[(count + k) % len(bodies)], headers=JSON)
            count += 1
    await asyncio.gather(*(loop(k) for k in range(in_flight)))
    return count / seconds


async def mixed(client: httpx.AsyncClient, data: Data, duration: float, rate: float, batch_rate: float,
                server_pid: int) -> dict:
    latencies: dict[tuple[str, str], list[float]] = defaultdict(list)
    statuses: dict[str, dict[int, int]] = defaultdict(lambda: defaultdict(int))
    failures: dict[str, int] = defaultdict(int)
    fit_window = [float("inf"), float("inf")]
    drift_ids: list[str] = []
    tasks: set[asyncio.Task] = set()

    async def call(route: str, method: str, url: str, body: bytes | None, headers: dict, timeout: float = 60):
        started = time.monotonic()
        try:
            response = await client.request(method, url, content=body, headers=headers, timeout=timeout)
        except httpx.HTTPError:
            failures[route] += 1
            return None
        finished = time.monotonic()
        during = started < fit_window[1] and finished > fit_window[0]
        latencies[(route, "during fit" if during else "idle")].append(finished - started)
        statuses[route][response.status_code] += 1
        return response

    async def drift_call() -> None:
        response = await call("drift", "POST", f"/v1/segmentations/{NAME}/drift", data.drift, JSON)
        if response is not None and response.status_code == 200:
            drift_ids.append(response.json()["id"])

    async def fit_call() -> None:
        fit_window[0] = time.monotonic()
        await call("fit", "POST", f"/v1/segmentations/{NAME}/fit{FIT_QUERY}", data.fit_csv,
                   {"content-type": "text/csv"}, timeout=900)
        fit_window[1] = time.monotonic()

    def spawn(coroutine) -> None:
        task = asyncio.create_task(coroutine)
        tasks.add(task)
        task.add_done_callback(tasks.discard)

    rss_start = rss_mib(server_pid)
    start = time.monotonic()
    next_single, next_batch, next_drift, fit_started = start, start, start + 1.0, False
    i = 0
    while (now := time.monotonic()) < start + duration:
        while next_single <= now:
            spawn(call("assign 1 record", "POST", f"/v1/segmentations/{NAME}/assign", data.singles[i % 500], JSON))
            i += 1
            next_single += 1.0 / rate
        if next_batch <= now:
            spawn(call("assign 1,000 rows", "POST", f"/v1/segmentations/{NAME}/assign", data.batch, JSON))
            next_batch += 1.0 / batch_rate
        if next_drift <= now:
            spawn(drift_call())
            next_drift += 5.0
        if not fit_started and now >= start + duration / 3:
            spawn(fit_call())
            fit_started = True
        await asyncio.sleep(min(next_single, next_batch, next_drift) - time.monotonic() if tasks else 0.001)
    pending_fit = [t for t in tasks]
    await asyncio.gather(*pending_fit)          # let the last requests (and the fit, if still running) finish
    rss_end = rss_mib(server_pid)
    listed = (await client.get(f"/v1/segmentations/{NAME}/drift?limit=500")).json()["reports"]
    lost = sorted(set(drift_ids) - {r["id"] for r in listed})
    return {"latencies": latencies, "statuses": statuses, "failures": failures, "rss": (rss_start, rss_end),
            "drift_reports": len(drift_ids), "lost_reports": len(lost), "fit_seconds": fit_window[1] - fit_window[0],
            "elapsed": time.monotonic() - start}


async def main_async(args, port: int, server_pid: int, data: Data) -> None:
    limits = httpx.Limits(max_connections=64, max_keepalive_connections=64)
    async with httpx.AsyncClient(base_url=f"http://127.0.0.1:{port}", limits=limits, timeout=60) as client:
        for body in data.singles[:50]:                                   # warm-up
            await client.post(f"/v1/segmentations/{NAME}/assign", content=body, headers=JSON)
        if args.part in ("both", "isolation"):
            result = await isolation(client, data, args.idle)
            idle99, during99 = (np.percentile(np.asarray(result[k]) * 1000, 99) for k in ("idle", "during"))
            print("\n== single-record assign, one at a time: idle vs during a 100,000 x 20 fit ==")
            print(f"idle        {percentiles(result['idle'])}")
            print(f"during fit  {percentiles(result['during'])}")
            print(f"p99 ratio during/idle: {during99 / idle99:.2f} (goal <= 3); fit answered "
                  f"{result['fit_status']} after {result['fit_seconds']:.1f} s")
        if args.part in ("both", "mixed"):
            # "70 % of the peak" for a mix: each kind of request takes its share of the server's capacity, so
            # rate / peak_single + batch_rate / peak_batch = share (drift, every 5 s, and the fit's parsing come
            # on top). Batches get a fifth of the share.
            peak = await peak_rate(client, data.singles)
            peak_batch = await peak_rate(client, [data.batch], in_flight=2)
            batch_rate = args.share / 5 * peak_batch
            rate = (args.share - batch_rate / peak_batch) * peak
            print(f"\n== mixed load: {args.duration:.0f} s; measured peaks: {peak:.0f} single assigns/s, "
                  f"{peak_batch:.1f} batches/s of 1,000 rows; offered {args.share:.0%} of capacity: {rate:.0f} "
                  f"single/s + {batch_rate:.2f} batches/s, a 2,000-row drift report every 5 s, one fit ==")
            result = await mixed(client, data, args.duration, rate, batch_rate, server_pid)
            for route, counts in sorted(result["statuses"].items()):
                errors = sum(n for status, n in counts.items() if status >= 500)
                print(f"{route:18s} requests {sum(counts.values()):6d}  statuses {dict(counts)}  5xx {errors}  "
                      f"client errors {result['failures'].get(route, 0)}")
            for (route, phase), values in sorted(result["latencies"].items()):
                print(f"{route:18s} {phase:10s} {percentiles(values)}")
            start_rss, end_rss = result["rss"]
            print(f"drift reports answered 200: {result['drift_reports']}, lost: {result['lost_reports']}")
            print(f"fit took {result['fit_seconds']:.1f} s; run took {result['elapsed']:.1f} s")
            print(f"server RSS start {start_rss:.0f} MiB, end {end_rss:.0f} MiB "
                  f"({(end_rss - start_rss) / start_rss:+.1%}; goal under +10 %)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--duration", type=float, default=60.0)
    parser.add_argument("--idle", type=float, default=10.0)
    parser.add_argument("--share", type=float, default=0.7)
    parser.add_argument("--part", choices=("both", "isolation", "mixed"), default="both")
    args = parser.parse_args()
    print(f"machine: {cpu_model()}, {os.cpu_count()} CPUs, load average before: {load_average()}")
    data = Data()
    with tempfile.TemporaryDirectory(prefix="segscore-load-") as folder:
        store = Path(folder) / "store"
        bundle = fit_bundle(data.training, FitConfig(features=FEATURES, components=N_COMPONENTS, k_min=N_BLOBS,
                                                     k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
        FilesystemStore(store).save_version(NAME, bundle, make_live=True)
        port = free_port()
        server = start_server(store, port)
        try:
            wait_ready(f"http://127.0.0.1:{port}/healthz", server)
            asyncio.run(asyncio.wait_for(main_async(args, port, server.pid, data), timeout=args.duration + 900))
        finally:
            os.killpg(server.pid, signal.SIGTERM)
            try:
                server.wait(30)
            except subprocess.TimeoutExpired:
                os.killpg(server.pid, signal.SIGKILL)
    print(f"load average after: {load_average()}")


if __name__ == "__main__":
    main()
