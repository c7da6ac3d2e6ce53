"""``segscore serve --workers 2``: two real uvicorn worker processes behind one port.

/metrics (whichever worker answers it) adds up both workers' counts: checked against the number of requests
made, parsed with prometheus_client's own text parser. Each worker runs its own store watcher: a promote and a
new key made through one worker (or the CLI) reach both. Which worker answered is read from the workers' own
metric files (prometheus_client's multiprocess files, one per worker process id, in the fresh directory the
server makes under TMPDIR), so the tests know that both workers served. Deadlines only guard against a hang.
"""

from __future__ import annotations

import shutil
import tempfile
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx2
import pytest
from prometheus_client.multiprocess import MultiProcessCollector
from prometheus_client.parser import text_string_to_metric_families

from tests.conftest import records_from
from tests.serving import segscore_server

DEADLINE = 90.0
ASSIGN_TEMPLATE = "/v1/segmentations/{name}/assign"     # the route label of the assign metrics


def scraped(base: str, sample_name: str, **labels: str) -> float:
    """The sum of the matching samples of /metrics, parsed by prometheus_client's text parser."""
    text = httpx2.get(f"{base}/metrics", timeout=30).text
    return sum(sample.value for family in text_string_to_metric_families(text) for sample in family.samples
               if sample.name == sample_name and all(sample.labels.get(k) == v for k, v in labels.items()))


def per_worker(tmp_dir: Path, sample_name: str, **labels: str) -> dict[str, float]:
    """Worker process id -> the sum of its matching counter samples, read from that worker's own file."""
    counts: dict[str, float] = {}
    for path in tmp_dir.glob("segscore-metrics-*/counter_*.db"):
        pid = path.stem.rsplit("_", 1)[-1]
        for family in MultiProcessCollector.merge([str(path)]):
            for sample in family.samples:
                if sample.name == sample_name and all(sample.labels.get(k) == v for k, v in labels.items()):
                    counts[pid] = counts.get(pid, 0.0) + sample.value
    return counts


def on_new_connections(base: str, count: int, send) -> list[httpx2.Response]:
    """``count`` requests, 4 at a time, each on a new connection (so that the kernel hands them to either
    worker)."""
    def one(_):
        with httpx2.Client(base_url=base, timeout=60) as client:
            return send(client)
    with ThreadPoolExecutor(4) as pool:
        return list(pool.map(one, range(count)))


def until_both_workers(tmp_dir: Path, base: str, send, sample_name: str, what: str, **labels: str) -> None:
    """Send requests until the metric files of two worker processes both count the matching sample."""
    started = time.monotonic()
    while len([v for v in per_worker(tmp_dir, sample_name, **labels).values() if v > 0]) < 2:
        assert time.monotonic() - started < DEADLINE, \
            f"{what}: not seen on both workers after {DEADLINE} s: {per_worker(tmp_dir, sample_name, **labels)}"
        on_new_connections(base, 8, send)


@pytest.fixture(scope="module")
def two_workers(tmp_path_factory):
    """One 2-worker server for the module's first two tests (a server start is much of their time). They use
    segmentations of their own; the metrics test counts from a fresh server, so it runs first, and the promote
    test, whose key turns authentication on, runs last."""
    tmp_path = tmp_path_factory.mktemp("workers")
    store_dir = tmp_path / "store"
    # A short TMPDIR of the module's own: the fit workers' forkserver puts a Unix socket under it, and a
    # socket's path may not exceed 107 bytes (pytest's tmp_path, under a long test name, can).
    tmp_dir = Path(tempfile.mkdtemp(prefix="ssw-", dir="/tmp"))
    try:
        with segscore_server(tmp_path, "--workers", "2", "--store", str(store_dir),
                             settings_env={"TMPDIR": str(tmp_dir)}) as base:
            assert len(list(tmp_dir.glob("segscore-metrics-*"))) == 1
            yield base, store_dir, tmp_dir
        # The server removes its metrics directory when it stops.
        assert list(tmp_dir.glob("segscore-metrics-*")) == []
    finally:
        shutil.rmtree(tmp_dir, ignore_errors=True)


def test_metrics_add_up_across_two_workers(two_workers, iris):
    base, _, tmp_dir = two_workers
    records = records_from(iris, id_prefix="r")
    fitted = httpx2.post(f"{base}/v1/segmentations/shop/fit", json={"records": records, "k": 3, "id_column": "id"},
                         timeout=300)
    assert fitted.status_code == 201, fitted.text

    route = ASSIGN_TEMPLATE.format(name="shop")
    sent = 0
    started = time.monotonic()
    # Enough single-record assigns that both workers answered some (read from their own files).
    while len(per_worker(tmp_dir, "segscore_http_requests_total", route=ASSIGN_TEMPLATE)) < 2:
        assert time.monotonic() - started < DEADLINE, "one worker never answered"
        answers = on_new_connections(base, 20, lambda c: c.post(route, json={"records": records[:1]}))
        assert [a.status_code for a in answers] == [200] * 20
        sent += 20

    template = ASSIGN_TEMPLATE
    by_worker = per_worker(tmp_dir, "segscore_http_requests_total", route=template, status="200")
    assert len(by_worker) == 2 and all(count > 0 for count in by_worker.values())
    # The exposition adds up both workers: counts equal the requests made, whichever worker answers /metrics.
    for _ in range(4):
        assert scraped(base, "segscore_http_requests_total", method="POST", route=template, status="200") == sent
        assert scraped(base, "segscore_records_assigned_total", segmentation="shop", version="1") == sent
        assert scraped(base, "segscore_http_request_seconds_count", route=template) == sent
    # Both workers loaded the live version at start-up or on first use: two compiled copies in memory.
    assert scraped(base, "segscore_bundles_loaded") == 2


def test_a_promote_and_a_new_key_reach_both_workers(two_workers, iris):
    base, store_dir, tmp_dir = two_workers
    records = records_from(iris)
    with httpx2.Client(base_url=base, timeout=300) as client:
        for k in (3, 2):
            assert client.post("/v1/segmentations/promoted/fit", json={"records": records, "k": k,
                                                                      "make_live": k == 3}).status_code == 201
        assert client.put("/v1/segmentations/promoted/live", json={"version": 2}).status_code == 200

    route = ASSIGN_TEMPLATE.format(name="promoted")
    # Each worker runs its own store watcher: both end up serving version 2, though one made the promote.
    until_both_workers(tmp_dir, base, lambda c: c.post(route, json={"records": records[:1]}),
                       "segscore_records_assigned_total", "the promote", segmentation="promoted",
                       version="2")
    answers = on_new_connections(base, 16, lambda c: c.post(route, json={"records": records[:1]}))
    assert {a.json()["version"] for a in answers} == {2}

    # A key made with the CLI turns authentication on in both workers.
    segscore = Path(sys.executable).with_name("segscore")
    made = subprocess.run([str(segscore), "keys", "create", "--store", str(store_dir), "--name", "ops",
                           "--scope", "admin"], capture_output=True, text=True, timeout=120)
    assert made.returncode == 0, made.stderr
    key = made.stdout.strip().splitlines()[-1]
    until_both_workers(tmp_dir, base, lambda c: c.get("/v1/segmentations"), "segscore_http_requests_total",
                       "authentication on", route="/v1/segmentations", status="401")
    answers = on_new_connections(base, 16, lambda c: c.get("/v1/segmentations",
                                                           headers={"Authorization": f"Bearer {key}"}))
    assert [a.status_code for a in answers] == [200] * 16


def test_every_worker_loads_the_live_version_before_any_assign(tmp_path, iris):
    from service.core.bundle import FitConfig
    from service.core.fit import fit_bundle
    from service.store import FilesystemStore

    store_dir = tmp_path / "store"
    bundle = fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=3, k_max=3, k_fixed=True))
    FilesystemStore(store_dir).save_version("shop", bundle, make_live=None)
    with segscore_server(tmp_path, "--workers", "2", "--store", str(store_dir)) as base:
        # No assign is made: a /readyz probe (one worker answers it) could explain one copy, not two.
        started = time.monotonic()
        while scraped(base, "segscore_bundles_loaded") != 2:
            assert time.monotonic() - started < DEADLINE, f"bundles loaded: {scraped(base, 'segscore_bundles_loaded')}"
            time.sleep(0.2)
        assert scraped(base, "segscore_http_requests_total", route=ASSIGN_TEMPLATE) == 0
