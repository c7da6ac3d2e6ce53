"""Load and isolation benchmark (not a test): a real uvicorn server on 127.0.0.1, driven by wrk and a small thread.

Two parts, both bounded in time, both stopping by themselves:

1. ``isolation``: single-record assigns, one at a time (a Python client, never more than one request in flight),
   for ``--idle`` seconds; then a 100,000 x 20 fit (CSV, k = 8, 5 components) is posted and single-record
   assigns continue, one at a time, until the fit answers. p50/p99 of each phase and their ratio (goal: p99
   during the fit within 3x idle).
2. ``mixed``: the steady traffic comes from wrk (C, event-driven; ``bench/http/paced.lua``), one wrk process
   per route: single-record assigns and 1,000-row batches. First each route's closed-loop peak is measured
   with the same wrk setup (same connections, same script, no pacing); then ``--duration`` seconds at
   ``--share`` (70 %) of the capacity: each route paced to its share (single assigns 4/5 of it, batches 1/5;
   ``rate_single / peak_single + rate_batch / peak_batch = share``). One Python thread posts a 2,000-row
   drift report every 5 s (every report answered 2xx must be in the stored list afterwards, else it is
   "lost") and another posts the 100,000-row fit a third of the way in. wrk runs in consecutive segments,
   so the latency figures split into phases: idle (before the fit), during the fit (the segment is stopped
   with SIGINT when the fit answers) and after it. Statuses are counted per route by the Lua script (every
   5xx counted). Memory: the server process's RSS at the start and end of the ``--duration`` seconds (the fit
   runs in other processes: the forkserver and its fit worker, reported apart as their peak RSS). CPU: the
   share of one core used by wrk, by this script (the drift and fit threads and the sampler), by the server,
   by the fit processes, and by everything else on the machine (other jobs) over the same window.

   The mixed part runs twice, each on its own new server: ``fresh`` (no fit since the server started; only the
   peak measurement before the window) and ``warm`` (one fit and 15 s of the same paced traffic first), so
   memory growth is shown both with and without the first fit's one-off allocations.

    .venv/bin/python bench/load_mixed.py [--duration 60] [--idle 10] [--share 0.7]
                                         [--part both|isolation|mixed] [--modes fresh,warm]

Needs wrk (Debian/Ubuntu: ``apt-get install wrk``) for the mixed part.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

import httpx2 as httpx  # noqa: E402  (the httpx-compatible client the test extra installs)
import numpy as np  # noqa: E402
import orjson  # noqa: E402
import psutil  # noqa: E402
from sklearn.datasets import make_blobs  # noqa: E402

from machine import cpu_model, load_average  # noqa: E402
from service.core.bundle import FitConfig  # noqa: E402
from service.core.fit import fit_bundle  # noqa: E402
from service.store import FilesystemStore  # noqa: E402

NAME = "bench"
N_ROWS, N_FEATURES, N_BLOBS, N_COMPONENTS = 100_000, 20, 8, 5
FEATURES = [f"f{j:02d}" for j in range(N_FEATURES)]
FIT_QUERY = f"?k={N_BLOBS}&components={N_COMPONENTS}&n_init=3&make_live=false"
PACED_LUA = HERE / "http" / "paced.lua"
WRK_HINT = "wrk is not installed. On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk"
DRIFT_EVERY = 5.0
PEAK_SECONDS = 5.0
WARM_UP_SECONDS = 15.0
PHASES = ("idle", "during fit", "after fit")


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
    return psutil.Process(pid).memory_info().rss / 2**20


def percentiles(values: list[float]) -> str:
    if not values:
        return "n/a"
    ms = np.asarray(values) * 1000
    return f"p50 {np.percentile(ms, 50):7.2f} ms  p99 {np.percentile(ms, 99):7.2f} ms  (n={len(values)})"


class Data:
    def __init__(self, folder: Path) -> None:
        values, _ = make_blobs(n_samples=N_ROWS, n_features=N_FEATURES, centers=N_BLOBS, random_state=0)
        self.training = values
        fresh, _ = make_blobs(n_samples=5_000, n_features=N_FEATURES, centers=N_BLOBS, random_state=1)
        rows = [dict(zip(FEATURES, row)) for row in fresh.tolist()]
        self.singles = [orjson.dumps({"records": [row]}) for row in rows[:500]]
        self.batch = orjson.dumps({"records": rows[:1000]})
        self.drift = orjson.dumps({"records": rows[:2000]})
        header = ",".join(FEATURES)
        self.fit_csv = (header + "\n" + "\n".join(",".join(f"{v:.6f}" for v in row) for row in values)).encode()
        # wrk's bodies: one JSON document per line (orjson writes no newlines inside one)
        self.singles_file = folder / "singles.jsonl"
        self.singles_file.write_bytes(b"\n".join(self.singles) + b"\n")
        self.batches_file = folder / "batches.jsonl"
        self.batches_file.write_bytes(self.batch + b"\n")


def start_server(store: Path, port: int) -> subprocess.Popen:
    env = {**os.environ, "SEGSCORE_STORE_DIR": str(store), "PYTHONPATH": str(ROOT),
           "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    return subprocess.Popen([sys.executable, "-m", "uvicorn", "--factory", "service.app:create_app", "--host",
                             "127.0.0.1", "--port", str(port), "--no-access-log", "--log-level", "warning"],
                            cwd=ROOT, env=env, start_new_session=True, stdout=subprocess.DEVNULL)


def stop_server(server: subprocess.Popen) -> None:
    os.killpg(server.pid, signal.SIGTERM)
    try:
        server.wait(30)
    except subprocess.TimeoutExpired:
        os.killpg(server.pid, signal.SIGKILL)
        server.wait(30)


JSON = {"content-type": "application/json"}


# ----------------------------------------------------------------------------------------------- part 1
def isolation(base: str, data: Data, idle_seconds: float) -> None:
    url = f"{base}/v1/segmentations/{NAME}/assign"
    with httpx.Client(timeout=60) as client:
        for body in data.singles[:50]:                                   # warm-up
            client.post(url, content=body, headers=JSON)
        idle: list[float] = []
        end = time.monotonic() + idle_seconds
        i = 0
        while time.monotonic() < end:
            started = time.perf_counter()
            response = client.post(url, content=data.singles[i % 500], headers=JSON)
            idle.append(time.perf_counter() - started)
            assert response.status_code == 200, response.status_code
            i += 1
        fit = FitCall(base, data)
        fit.start()
        during: list[float] = []
        time.sleep(0.5)                   # the upload and parse; measure while the worker fits
        while not fit.done.is_set():
            started = time.perf_counter()
            response = client.post(url, content=data.singles[i % 500], headers=JSON)
            during.append(time.perf_counter() - started)
            assert response.status_code == 200, response.status_code
            i += 1
        fit.join()
    idle99, during99 = (np.percentile(np.asarray(v) * 1000, 99) for v in (idle, during))
    print("\n== single-record assign, one at a time: idle vs during a 100,000 x 20 fit ==")
    print(f"idle        {percentiles(idle)}")
    print(f"during fit  {percentiles(during)}")
    print(f"p99 ratio during/idle: {during99 / idle99:.2f} (goal <= 3); fit answered "
          f"{fit.status} after {fit.seconds:.1f} s")


# ----------------------------------------------------------------------------------------------- part 2
@dataclass(frozen=True)
class Route:
    label: str
    bodies: Path
    connections: int


class Wrk:
    """One wrk process on one route: paced at ``rate`` requests/s (0 = closed loop), stopping by itself after
    ``seconds``, or earlier at ``stop()`` (SIGINT: wrk stops and prints its summary)."""

    def __init__(self, base: str, route: Route, rate: float, seconds: float) -> None:
        self.route = route
        command = ["wrk", "-t", "1", "-c", str(route.connections), "-d", f"{max(1, round(seconds))}s",
                   "--timeout", "60s", "-s", str(PACED_LUA), f"{base}/v1/segmentations/{NAME}/assign", "--",
                   str(route.bodies), f"{rate:.3f}", "1"]
        self.process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE)

    def running(self) -> bool:
        # waitid with WNOWAIT: look without reaping, so that finish() can still collect wrk's rusage
        return os.waitid(os.P_PID, self.process.pid, os.WEXITED | os.WNOHANG | os.WNOWAIT) is None

    def stop(self) -> None:
        if self.running():
            self.process.send_signal(signal.SIGINT)

    def finish(self) -> dict:
        out = self.process.stdout.read().decode()
        err = self.process.stderr.read().decode()
        _, status, usage = os.wait4(self.process.pid, 0)        # wait4, not wait(): wrk's own CPU time
        self.process.returncode = os.waitstatus_to_exitcode(status)
        lines = [line for line in out.splitlines() if line.startswith("WRK_JSON ")]
        if self.process.returncode != 0 or not lines:
            raise RuntimeError(f"wrk failed ({self.process.returncode}):\n{out}\n{err}")
        summary = json.loads(lines[-1].removeprefix("WRK_JSON "))
        summary["statuses"] = {int(k): v for k, v in summary["statuses"].items()}
        summary["cpu_s"] = usage.ru_utime + usage.ru_stime
        summary["seconds"] = summary["duration_us"] / 1e6
        return summary


def run_segment(base: str, plan: list[tuple[Route, float]], seconds: float,
                stop_when: threading.Event | None = None) -> dict[str, dict]:
    """One wrk per (route, rate), all started together; returns each route's summary."""
    runs = [Wrk(base, route, rate, seconds) for route, rate in plan]
    if stop_when is not None:
        while any(run.running() for run in runs):
            if stop_when.wait(0.05):
                for run in runs:
                    run.stop()
                break
    return {run.route.label: run.finish() for run in runs}


class FitCall(threading.Thread):
    """The 100,000-row fit, posted from a thread; ``done`` is set when it answers."""

    def __init__(self, base: str, data: Data) -> None:
        super().__init__(name="fit", daemon=True)
        self.base, self.data = base, data
        self.done = threading.Event()
        self.status: int | str = "not answered"
        self.started = self.ended = float("nan")

    def run(self) -> None:
        self.started = time.monotonic()
        try:
            response = httpx.post(f"{self.base}/v1/segmentations/{NAME}/fit{FIT_QUERY}", content=self.data.fit_csv,
                                  headers={"content-type": "text/csv"}, timeout=900)
            self.status = response.status_code
        except httpx.HTTPError as exc:
            self.status = type(exc).__name__
        finally:
            self.ended = time.monotonic()
            self.done.set()

    @property
    def seconds(self) -> float:
        return self.ended - self.started


class DriftCalls(threading.Thread):
    """A 2,000-row drift report every DRIFT_EVERY seconds until ``until`` (monotonic)."""

    def __init__(self, base: str, data: Data, until: float) -> None:
        super().__init__(name="drift", daemon=True)
        self.base, self.data, self.until = base, data, until
        self.statuses: dict[int | str, int] = {}
        self.latencies: list[tuple[float, float, float]] = []      # (started, ended, seconds)
        self.ids: list[str] = []

    def run(self) -> None:
        url = f"{self.base}/v1/segmentations/{NAME}/drift"
        next_call = time.monotonic() + 1.0
        with httpx.Client(timeout=60) as client:
            while next_call < self.until:
                time.sleep(max(0.0, next_call - time.monotonic()))
                next_call += DRIFT_EVERY
                started = time.monotonic()
                try:
                    response = client.post(url, content=self.data.drift, headers=JSON)
                except httpx.HTTPError as exc:
                    key: int | str = type(exc).__name__
                else:
                    key = response.status_code
                    if 200 <= key < 300:
                        self.ids.append(response.json()["id"])
                ended = time.monotonic()
                self.statuses[key] = self.statuses.get(key, 0) + 1
                self.latencies.append((started, ended, ended - started))

    def lost(self) -> int:
        listed = httpx.get(f"{self.base}/v1/segmentations/{NAME}/drift?limit=500", timeout=60).json()["reports"]
        return len(set(self.ids) - {report["id"] for report in listed})


class Sampler(threading.Thread):
    """Every 0.5 s: the server's RSS, and the RSS and CPU time of its descendants (the forkserver and the fit
    workers it starts)."""

    def __init__(self, server_pid: int) -> None:
        super().__init__(name="sampler", daemon=True)
        self.server = psutil.Process(server_pid)
        self.stopping = threading.Event()
        self.server_peak = 0.0
        self.children_peak = 0.0
        self.children_cpu: dict[int, float] = {}
        self.baseline_cpu: dict[int, float] = {}
        for child in self.server.children(recursive=True):
            try:
                times = child.cpu_times()
                self.baseline_cpu[child.pid] = times.user + times.system
            except psutil.Error:
                pass

    def run(self) -> None:
        while not self.stopping.wait(0.5):
            self.sample()

    def sample(self) -> None:
        try:
            self.server_peak = max(self.server_peak, self.server.memory_info().rss / 2**20)
            children = self.server.children(recursive=True)
        except psutil.Error:
            return
        total = 0.0
        for child in children:
            try:
                total += child.memory_info().rss / 2**20
                times = child.cpu_times()
                self.children_cpu[child.pid] = times.user + times.system
            except psutil.Error:
                pass
        self.children_peak = max(self.children_peak, total)

    def stop(self) -> None:
        self.stopping.set()
        self.join()
        self.sample()

    def fit_cpu_seconds(self) -> float:
        return sum(cpu - self.baseline_cpu.get(pid, 0.0) for pid, cpu in self.children_cpu.items())


def gauges(base: str) -> dict[str, float]:
    """A few of the server's own gauges (/metrics): versions held in memory, the live recorder's backlog."""
    wanted = ("segscore_bundles_loaded", "segscore_live_queue_bytes", "segscore_live_inline_tallies")
    found = {}
    for line in httpx.get(f"{base}/metrics", timeout=30).text.splitlines():
        name, _, value = line.partition(" ")
        if name in wanted:
            found[name.removeprefix("segscore_")] = float(value)
    return found


def own_cpu_seconds() -> float:
    times = os.times()
    return times.user + times.system


def process_cpu_seconds(pid: int) -> float:
    times = psutil.Process(pid).cpu_times()
    return times.user + times.system


def machine_busy_seconds() -> float:
    # guest time is already inside user time, and steal is time the hypervisor gave elsewhere: neither is counted
    times = psutil.cpu_times()
    return times.user + times.nice + times.system + times.irq + times.softirq


def measure_peaks(base: str, routes: list[Route]) -> dict[str, float]:
    """Closed-loop requests/s of each route alone, through the same wrk script and connections."""
    peaks = {}
    for route in routes:
        run_segment(base, [(route, 0.0)], 2)                               # warm-up
        summary = run_segment(base, [(route, 0.0)], PEAK_SECONDS)[route.label]
        peaks[route.label] = summary["requests"] / summary["seconds"]
    return peaks


@dataclass
class Window:
    segments: dict[str, dict[str, dict]] = field(default_factory=dict)     # phase -> route -> wrk summary
    wall: float = 0.0


def paced_window(base: str, data: Data, plan: list[tuple[Route, float]], duration: float, fit_at: float | None,
                 drift: DriftCalls | None) -> tuple[Window, FitCall | None]:
    """``duration`` seconds of paced wrk traffic in consecutive segments; with ``fit_at``, the fit is posted
    that many seconds in and the segment that overlaps it is stopped when it answers."""
    window = Window()
    start = time.monotonic()
    end = start + duration
    fit = None
    if drift is not None:
        drift.start()
    if fit_at is None:
        window.segments["idle"] = run_segment(base, plan, duration)
    else:
        window.segments["idle"] = run_segment(base, plan, fit_at)
        fit = FitCall(base, data)
        fit.start()
        window.segments["during fit"] = run_segment(base, plan, end - time.monotonic(), stop_when=fit.done)
        if end - time.monotonic() >= 1.0:
            window.segments["after fit"] = run_segment(base, plan, end - time.monotonic())
    window.wall = time.monotonic() - start
    if fit is not None:
        fit.join(900)
    if drift is not None:
        drift.join(120)
    return window, fit


def mixed(base: str, server_pid: int, data: Data, routes: list[Route], rates: dict[str, float], duration: float,
          warm: bool) -> dict:
    plan = [(route, rates[route.label]) for route in routes]
    result: dict = {"mode": "warm" if warm else "fresh", "rss_ready": rss_mib(server_pid)}
    if warm:
        # One fit and some traffic first: the first fit's one-off allocations (imports, the forkserver,
        # buffers) are then not counted as growth.
        warm_drift = DriftCalls(base, data, time.monotonic() + WARM_UP_SECONDS)
        _, fit = paced_window(base, data, plan, WARM_UP_SECONDS, 1.0, warm_drift)
        result["warm_up_fit"] = fit.status
        time.sleep(2)
    result["load_before"] = load_average()
    drift = DriftCalls(base, data, time.monotonic() + duration)
    sampler = Sampler(server_pid)
    rss_start = rss_mib(server_pid)
    result["gauges_start"] = gauges(base)
    cpu = (own_cpu_seconds(), process_cpu_seconds(server_pid), machine_busy_seconds(), time.monotonic())
    sampler.start()
    window, fit = paced_window(base, data, plan, duration, duration / 3, drift)
    sampler.stop()
    rss_end = rss_mib(server_pid)
    result["gauges_end"] = gauges(base)
    wall = time.monotonic() - cpu[3]       # the window, plus the fit's end if it answers after the window
    own = own_cpu_seconds() - cpu[0]
    server_cpu = process_cpu_seconds(server_pid) - cpu[1]
    busy = machine_busy_seconds() - cpu[2]
    wrk_cpu = sum(s["cpu_s"] for phase in window.segments.values() for s in phase.values())
    fit_cpu = sampler.fit_cpu_seconds()
    time.sleep(5)
    result.update(
        rss_start=rss_start, rss_end=rss_end, rss_settled=rss_mib(server_pid), rss_peak=sampler.server_peak,
        children_peak=sampler.children_peak, window=window, fit_status=fit.status, fit_seconds=fit.seconds,
        fit_window=(fit.started, fit.ended), drift_statuses=drift.statuses, drift_latencies=drift.latencies,
        drift_ok=len(drift.ids), lost=drift.lost(), load_after=load_average(),
        cpu={"wrk": wrk_cpu / wall, "driver (python)": own / wall, "server": server_cpu / wall,
             "fit processes": fit_cpu / wall, "other processes": (busy - wrk_cpu - own - server_cpu - fit_cpu) / wall,
             "machine busy": busy / wall})
    return result


def print_mixed(result: dict, routes: list[Route], rates: dict[str, float], duration: float) -> None:
    window: Window = result["window"]
    print(f"\n-- {result['mode']} server: load average before {result['load_before']}, after {result['load_after']}"
          + (f"; warm-up fit answered {result['warm_up_fit']}" if "warm_up_fit" in result else ""))
    print(f"{'route':18s} {'phase':11s} {'seconds':>7s} {'offered/s':>9s} {'achieved/s':>10s} {'requests':>8s} "
          f"{'p50 ms':>8s} {'p99 ms':>8s} {'max ms':>8s} {'late':>5s} {'5xx':>4s} {'sock err':>8s}  statuses")
    totals = {route.label: {"requests": 0, "5xx": 0, "errors": 0, "late": 0, "statuses": {}} for route in routes}
    for phase in PHASES:
        for route in routes:
            s = window.segments.get(phase, {}).get(route.label)
            if s is None:
                continue
            five = sum(n for status, n in s["statuses"].items() if status >= 500)
            errors = sum(s[k] for k in ("connect_errors", "read_errors", "write_errors", "timeouts"))
            total = totals[route.label]
            total["requests"] += s["requests"]
            total["5xx"] += five
            total["errors"] += errors
            total["late"] += s["late"]
            for status, n in s["statuses"].items():
                total["statuses"][status] = total["statuses"].get(status, 0) + n
            print(f"{route.label:18s} {phase:11s} {s['seconds']:7.1f} {rates[route.label]:9.1f} "
                  f"{s['requests'] / s['seconds']:10.1f} {s['requests']:8d} {s['p50_us'] / 1000:8.2f} "
                  f"{s['p99_us'] / 1000:8.2f} {s['max_us'] / 1000:8.1f} {s['late']:5d} {five:4d} {errors:8d}  "
                  f"{s['statuses']}")
    for label, total in totals.items():
        print(f"{label:18s} all phases: {total['requests']} requests, statuses {total['statuses']}, "
              f"5xx {total['5xx']}, socket errors/time-outs {total['errors']}, late sends {total['late']}")
    started, ended = result["fit_window"]
    for phase in ("idle", "during fit"):
        values = [d for s, e, d in result["drift_latencies"] if (s < ended and e > started) == (phase == "during fit")]
        print(f"{'drift 2,000 rows':18s} {phase:11s} {percentiles(values)}")
    print(f"drift statuses {result['drift_statuses']}; answered 2xx: {result['drift_ok']}, lost: {result['lost']}")
    print(f"fit answered {result['fit_status']} after {result['fit_seconds']:.1f} s")
    growth = (result["rss_end"] - result["rss_start"]) / result["rss_start"]
    print(f"server process RSS: at ready {result['rss_ready']:.0f} MiB, window start {result['rss_start']:.0f} MiB, "
          f"end {result['rss_end']:.0f} MiB ({growth:+.1%}; goal under +10 %), peak {result['rss_peak']:.0f} MiB, "
          f"5 s after the end {result['rss_settled']:.0f} MiB")
    print(f"forkserver + fit worker (separate processes): peak RSS {result['children_peak']:.0f} MiB")
    print(f"server gauges at the window's start {result['gauges_start']}, end {result['gauges_end']}")
    print("CPU over the window, in cores: " + ", ".join(f"{k} {v:.2f}" for k, v in result["cpu"].items())
          + f" (of {os.cpu_count()})")


def run_mixed(args, data: Data, bundle, folder: Path) -> None:
    if shutil.which("wrk") is None:
        print(f"SKIPPED mixed load: {WRK_HINT}")
        return
    routes = [Route("assign 1 record", data.singles_file, 64), Route("assign 1,000 rows", data.batches_file, 8)]
    rates: dict[str, float] | None = None
    results = []
    for mode in args.modes.split(","):
        store = folder / f"store-{mode}"
        FilesystemStore(store).save_version(NAME, bundle, make_live=True)
        port = free_port()
        server = start_server(store, port)
        base = f"http://127.0.0.1:{port}"
        try:
            wait_ready(f"{base}/healthz", server)
            if rates is None:
                # Measured once, on the first server, and offered to both, so the two runs carry the same load.
                peaks = measure_peaks(base, routes)
                single, batch = routes
                batch_share = args.share / 5
                rates = {single.label: (args.share - batch_share) * peaks[single.label],
                         batch.label: batch_share * peaks[batch.label]}
                print(f"\n== mixed load, {args.duration:.0f} s per server; closed-loop peaks (wrk -t1, "
                      f"{single.connections} / {batch.connections} connections): {peaks[single.label]:.0f} single "
                      f"assigns/s, {peaks[batch.label]:.1f} batches/s of 1,000 rows; offered {args.share:.0%} of "
                      f"capacity: {rates[single.label]:.0f} single/s + {rates[batch.label]:.1f} batches/s, a "
                      f"2,000-row drift report every {DRIFT_EVERY:.0f} s, a 100,000 x 20 fit at "
                      f"{args.duration / 3:.0f} s ==")
            result = mixed(base, server.pid, data, routes, rates, args.duration, warm=(mode == "warm"))
        finally:
            stop_server(server)
        print_mixed(result, routes, rates, args.duration)
        results.append(result)
    if results:
        print("\n== summary ==")
        for r in results:
            five = sum(n for phase in r["window"].segments.values() for s in phase.values()
                       for status, n in s["statuses"].items() if status >= 500)
            five += sum(n for status, n in r["drift_statuses"].items() if isinstance(status, int) and status >= 500)
            print(f"{r['mode']:5s}: 5xx {five}, lost reports {r['lost']}, server RSS {r['rss_start']:.0f} -> "
                  f"{r['rss_end']:.0f} MiB ({(r['rss_end'] - r['rss_start']) / r['rss_start']:+.1%}), wrk CPU "
                  f"{r['cpu']['wrk']:.2f} cores, other processes {r['cpu']['other processes']:.2f} cores")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--duration", type=float, default=60.0)
    parser.add_argument("--idle", type=float, default=10.0)
    parser.add_argument("--share", type=float, default=0.7)
    parser.add_argument("--part", choices=("both", "isolation", "mixed"), default="both")
    parser.add_argument("--modes", default="fresh,warm", help="mixed part: fresh, warm or both (comma-separated)")
    args = parser.parse_args()
    print(f"machine: {cpu_model()}, {os.cpu_count()} CPUs, load average before: {load_average()}")
    with tempfile.TemporaryDirectory(prefix="segscore-load-") as name:
        folder = Path(name)
        data = Data(folder)
        bundle = fit_bundle(data.training, FitConfig(features=FEATURES, components=N_COMPONENTS, k_min=N_BLOBS,
                                                     k_max=N_BLOBS, k_fixed=True, n_init=3, seed=0))
        if args.part in ("both", "isolation"):
            store = folder / "store-isolation"
            FilesystemStore(store).save_version(NAME, bundle, make_live=True)
            port = free_port()
            server = start_server(store, port)
            try:
                wait_ready(f"http://127.0.0.1:{port}/healthz", server)
                isolation(f"http://127.0.0.1:{port}", data, args.idle)
            finally:
                stop_server(server)
        if args.part in ("both", "mixed"):
            run_mixed(args, data, bundle, folder)
    print(f"load average after: {load_average()}")


if __name__ == "__main__":
    main()
