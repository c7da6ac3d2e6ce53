"""Fits in worker processes: the time limit stops the worker and writes nothing; a worker killed mid-fit (as
the kernel's out-of-memory killer would) fails that fit with a clear 503 and leaves the store consistent.

The worker death is real: the test sends SIGKILL to the worker's process id.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.fitting import FIT_WORKER_NICENESS, running_fit_workers
from service.settings import Settings
from tests.conftest import records_from

NAME = "shop"


def slow_fit_csv(rows: int = 60_000, features: int = 8) -> bytes:
    """A fit that takes many seconds with one thread (k searched over 2-12, 10 restarts each)."""
    values = np.random.default_rng(0).normal(size=(rows, features))
    header = ",".join(f"f{i}" for i in range(features))
    return (header + "\n" + "\n".join(",".join(f"{v:.6f}" for v in row) for row in values)).encode()


def post_slow_fit(client: TestClient):
    return client.post(f"/v1/segmentations/{NAME}/fit?k=2-12", content=slow_fit_csv(),
                       headers={"content-type": "text/csv"})


def pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def test_a_fit_past_its_time_limit_is_stopped_and_writes_nothing(tmp_path, iris):
    # Version 1 is fitted under the default limit: how long a small fit takes depends on the machine's load,
    # and no test asserts a duration. The slow fit (many seconds of work) is the one past the 1 s limit.
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as client:
        assert client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": 2}
                           ).status_code == 201
    with TestClient(create_app(Settings(store_dir=tmp_path / "store", fit_time_limit_seconds=1.0))) as client:
        seen: list[int] = []
        watcher = threading.Thread(target=lambda: [seen.extend(running_fit_workers()) or time.sleep(0.05)
                                                   for _ in range(200) if not seen])
        watcher.start()
        response = post_slow_fit(client)
        watcher.join(30)
        assert response.status_code == 504, response.text
        assert "SEGSCORE_FIT_TIME_LIMIT_SECONDS" in response.json()["detail"]
        assert [v["version"] for v in client.get(f"/v1/segmentations/{NAME}").json()["versions"]] == [1]
        assert running_fit_workers() == []
        assert seen and not pid_alive(seen[0])           # the worker was stopped, not left running
        folder = tmp_path / "store" / "segmentations" / NAME
        assert sorted(p.name for p in folder.iterdir()) == ["v000001.json"]
        objects = sorted(p.suffix for p in (tmp_path / "store" / "objects").rglob("*") if p.is_file())
        assert objects == [".joblib", ".npz"]             # version 1's two objects, nothing of the stopped fit


def test_a_killed_worker_fails_that_fit_with_503_and_the_store_stays_consistent(tmp_path, iris):
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as client:
        assert client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": 2}
                           ).status_code == 201
        result: dict = {}
        fitter = threading.Thread(target=lambda: result.setdefault("fit", post_slow_fit(client)))
        fitter.start()
        deadline = time.monotonic() + 60
        while not running_fit_workers() and time.monotonic() < deadline:
            time.sleep(0.02)
        workers = running_fit_workers()
        assert workers, "the slow fit never started a worker"
        time.sleep(0.5)                                   # well inside the fit
        # The worker yields the CPU to serving: it runs FIT_WORKER_NICENESS steps below the server (capped at
        # 19, the lowest priority setpriority(2) knows).
        assert os.getpriority(os.PRIO_PROCESS, workers[0]) == min(19, os.getpriority(os.PRIO_PROCESS, 0)
                                                                  + FIT_WORKER_NICENESS)
        os.kill(workers[0], signal.SIGKILL)
        fitter.join(60)
        assert not fitter.is_alive()
        response = result["fit"]
        assert response.status_code == 503, response.text
        assert "killed by signal 9" in response.json()["detail"]
        detail = client.get(f"/v1/segmentations/{NAME}").json()
        assert [v["version"] for v in detail["versions"]] == [1] and detail["live_version"] == 1
        # The server is fine: assign works and the next fit gets version 2.
        assert client.post(f"/v1/segmentations/{NAME}/assign", json={"records": records_from(iris)[:2]}
                           ).status_code == 200
        assert client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": 3}
                           ).json()["version"] == 2


@pytest.mark.parametrize("body, field", [
    ({"k": 200}, "k"),                                     # more segments than records: refused in the worker
])
def test_a_refusal_inside_the_worker_keeps_its_4xx_and_detail(client, iris, body, field):
    response = client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), **body})
    assert response.status_code == 422, response.text
    assert any(p["field"] == field for p in response.json()["detail"]), response.text
    assert client.get("/v1/segmentations").json()["segmentations"] == []


def test_fit_concurrency_bounds_the_number_of_worker_processes(tmp_path):
    # Two slow fits at once with SEGSCORE_FIT_CONCURRENCY=1: never more than one worker; each is then killed
    # (503) so that the test stays short.
    with TestClient(create_app(Settings(store_dir=tmp_path / "store", fit_concurrency=1))) as client:
        results: list = []
        fitters = [threading.Thread(target=lambda: results.append(post_slow_fit(client))) for _ in range(2)]
        for fitter in fitters:
            fitter.start()
        most, killed = 0, set()
        deadline = time.monotonic() + 120
        while len(killed) < 2 and time.monotonic() < deadline:
            workers = running_fit_workers()
            most = max(most, len(workers))
            for pid in workers:
                if pid not in killed:
                    time.sleep(0.3)                      # let the other fit try to start a worker meanwhile
                    most = max(most, len(running_fit_workers()))
                    os.kill(pid, signal.SIGKILL)
                    killed.add(pid)
            time.sleep(0.02)
        for fitter in fitters:
            fitter.join(60)
        assert len(killed) == 2 and most == 1
        assert sorted(r.status_code for r in results) == [503, 503]


LONG_TMPDIR_FIT = """
import json, sys
from fastapi.testclient import TestClient
from sklearn.datasets import load_iris
from service.app import create_app
from service.settings import Settings

iris = load_iris(as_frame=True).frame.drop(columns="target")
records = iris.to_dict(orient="records")
with TestClient(create_app(Settings(store_dir=sys.argv[1]))) as client:
    answer = client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 2})
    listed = client.get("/v1/segmentations").json()
print(json.dumps({"status": answer.status_code, "body": answer.json(), "listed": listed}))
"""


def test_a_worker_that_cannot_start_answers_503_saying_why(tmp_path):
    # A Unix socket path holds at most 107 bytes (Linux's sun_path): under a TMPDIR of ~150 characters the
    # forkserver cannot bind its socket. A fresh interpreter, so no forkserver of this test process is reused.
    import json
    import subprocess
    import sys

    long_tmp = tmp_path / ("t" * 150)
    long_tmp.mkdir()
    env = {**os.environ, "TMPDIR": str(long_tmp)}
    run = subprocess.run([sys.executable, "-c", LONG_TMPDIR_FIT, str(tmp_path / "store")], env=env,
                         capture_output=True, text=True, timeout=120, cwd=os.getcwd())
    assert run.returncode == 0, run.stderr[-2000:]
    answer = json.loads(run.stdout.strip().splitlines()[-1])
    assert answer["status"] == 503
    assert "could not start a fit worker" in answer["body"]["detail"]
    assert "set TMPDIR to a shorter path" in answer["body"]["detail"]
    assert str(long_tmp) not in answer["body"]["detail"]       # the length is told, not the server's path
    assert answer["listed"]["segmentations"] == []                 # nothing was written
