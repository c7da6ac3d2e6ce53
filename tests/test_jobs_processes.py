"""Background fit jobs against real ``segscore serve`` processes: a server killed with a job running and started
again, clients that go away while their job runs, the ``segscore fit`` / ``segscore jobs`` commands, and two
replicas on one PostgreSQL store (a job started on one is seen and cancelled through the other).

Data: Iris and wine (scikit-learn's copies) for the short fits; for the fit that must still be running when its
server is killed, blobs from ``sklearn.datasets.make_blobs`` (60,000 x 8, 19 candidate k: many seconds of
clustering on one thread), so the kill lands in the middle of 'clustering'.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from sklearn.datasets import make_blobs

from segscore.client import Client, Conflict, JobFailed, ServerError
from tests.conftest import records_from
from tests.serving import segscore_server

WAIT_SECONDS = 300          # an upper bound on a busy machine, not a measured time
WIDE = {"COLUMNS": "240", "NO_COLOR": "1"}
SEGSCORE = str(Path(sys.executable).with_name("segscore"))
BASE_ENV = {k: v for k, v in os.environ.items() if not k.startswith("SEGSCORE_")}


def wait_for(predicate, what: str):
    deadline = time.monotonic() + WAIT_SECONDS
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError(f"gave up waiting for {what}")


def descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (its forkserver and fit workers), read from /proc."""
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            children.setdefault(int(fields[1]), []).append(int(entry.name))
    found, stack = [], [pid]
    while stack:
        for child in children.get(stack.pop(), []):
            found.append(child)
            stack.append(child)
    return found


def job_owner_pid(store: Path, job_id: str) -> int:
    """The pid of the server process running a job: the job's owner is 'host:pid:token' in the store's index."""
    with sqlite3.connect(store / "index.sqlite3") as db:
        owner = db.execute("SELECT owner FROM jobs WHERE id=?", (job_id,)).fetchone()[0]
    return int(owner.split(":")[1])


def test_a_server_killed_with_a_running_job_is_followed_by_one_that_marks_it_failed(tmp_path):
    store = tmp_path / "store"
    (tmp_path / "first").mkdir()
    (tmp_path / "second").mkdir()
    values, _ = make_blobs(n_samples=60_000, n_features=8, centers=6, random_state=3)
    csv = pd.DataFrame(values, columns=[f"x{j}" for j in range(8)]).to_csv(index=False).encode()
    lease = {"SEGSCORE_JOB_LEASE_SECONDS": "1"}
    with segscore_server(tmp_path / "first", "--store", str(store), settings_env=lease) as url:
        with Client(url) as api:
            job = api.fit("blobs", csv_path(tmp_path, csv), k=(2, 20), background=True, wait=False)
            wait_for(lambda: api.job(job["id"])["step"].startswith("clustering"), "the fit to be clustering")
        server = job_owner_pid(store, job["id"])
        below = descendants(server)
        os.kill(server, signal.SIGKILL)             # no shutdown: the server cannot mark its job
        for pid in below:                           # its orphaned worker would compute on for nothing
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
    with segscore_server(tmp_path / "second", "--store", str(store), settings_env=lease) as url:
        with Client(url) as api:
            final = wait_for(lambda: (j := api.job(job["id"]))["state"] != "running" and j, "the job to be failed")
            assert (final["state"], final["version"]) == ("failed", None)
            assert "killed or restarted" in final["error"] and final["progress"] < 1
            assert api.segmentations() == []                 # no version, not even half of one
    assert list((store / "segmentations").glob("blobs/v*")) == []


def csv_path(tmp_path: Path, content: bytes) -> Path:
    path = tmp_path / "data.csv"
    path.write_bytes(content)
    return path


def test_a_job_goes_on_when_its_client_goes_away(tmp_path, iris):
    body = json.dumps({"records": records_from(iris), "k": {"min": 2, "max": 6}}).encode()
    with segscore_server(tmp_path, "--store", str(tmp_path / "store")) as url:
        port = int(url.rsplit(":", 1)[1])
        # A client that sends its fit, reads the status line of the 202 and drops the connection (a reset).
        with socket.create_connection(("127.0.0.1", port)) as connection:
            connection.sendall(b"POST /v1/segmentations/iris/fit?background=true HTTP/1.1\r\nHost: x\r\n"
                               b"Content-Type: application/json\r\nContent-Length: " + str(len(body)).encode()
                               + b"\r\n\r\n" + body)
            assert connection.recv(12) == b"HTTP/1.1 202"
            connection.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00\x00\x00\x00\x00")
        # A terminal that starts a fit and is killed while it follows the job.
        follower = subprocess.Popen([SEGSCORE, "fit", str(csv_path(tmp_path, pd.DataFrame(iris.data).add_prefix(
            "f").to_csv(index=False).encode())), "--name", "iris", "--k", "2-6", "--url", url],
            env={**BASE_ENV, **WIDE}, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        with Client(url) as api:
            wait_for(lambda: len(api.jobs(segmentation="iris")) == 2, "the second job")
            follower.kill()
            follower.wait(WAIT_SECONDS)
            jobs = wait_for(lambda: (js := api.jobs(segmentation="iris")) and all(
                j["state"] == "done" for j in js) and js, "both jobs to finish")
            assert sorted(j["version"] for j in jobs) == [1, 2]
            assert [v["version"] for v in api.versions("iris")] == [1, 2]


def shell(*arguments, env: dict[str, str]):
    """``segscore ARGS`` as a user runs it; (exit status, standard output, standard error)."""
    done = subprocess.run([SEGSCORE, *map(str, arguments)], capture_output=True, text=True, timeout=WAIT_SECONDS,
                          env={**BASE_ENV, **WIDE, **env})
    return done.returncode, done.stdout, done.stderr


def table_rows(output: str) -> list[list[str]]:
    return [[cell.strip() for cell in line.strip().strip("│").split("│")] for line in output.splitlines()
            if line.strip().startswith("│")]


def test_fit_follows_its_job_and_jobs_lists_it_end_to_end(tmp_path, wine):
    store = tmp_path / "store"
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    path = csv_path(tmp_path, frame.to_csv(index=False).encode())
    keys = {}
    for name, scope in (("analyst", "fit"), ("viewer", "read")):
        code, out, _ = shell("keys", "create", "--store", store, "--name", name, "--scope", scope, env={})
        assert code == 0
        keys[name] = out.splitlines()[-1]
    with segscore_server(tmp_path, "--store", str(store)) as url:
        analyst = {"SEGSCORE_URL": url, "SEGSCORE_API_KEY": keys["analyst"]}
        code, out, err = shell("fit", path, "--name", "wines", "--k", "2-5", "--seed", "0", env=analyst)
        assert code == 0, err
        with Client(url, key=keys["analyst"]) as api:
            (job,) = api.jobs()
            report = api.job_report(job["id"])      # a fit key reads its job's report (no read scope)
            synchronous = api.fit("wines", path, k=(2, 5), seed=0)        # the same body, without a job
        assert (job["state"], job["version"], job["progress"]) == ("done", 1, 1.0)
        assert synchronous["data_sha256"] == report["data_sha256"]
        assert synchronous["segments"] == report["segments"]
        chosen = [row for row in table_rows(out) if len(row) == 4 and row[3] == "*"]
        assert [int(row[0]) for row in chosen] == [report["k"]]           # the report printed as for a sync fit

        code, out, err = shell("jobs", env=analyst)
        assert code == 0, err
        rows = [row for row in table_rows(out) if row[0] == job["id"]]
        assert rows and rows[0][1:6] == ["wines", "done", "saving", "100%", "1"]
        code, out, _ = shell("jobs", "--segmentation", "wines", "--json", env=analyst)
        assert code == 0 and json.loads(out) == [job]
        code, out, _ = shell("jobs", "--segmentation", "other", env=analyst)
        assert code == 0 and "no background fit jobs" in out

        code, _, err = shell("fit", path, "--name", "wines", "--k", "200", env=analyst)   # refused at once
        assert code == 1 and "422" in err and "SEGSCORE_MAX_K" in err
        code, _, err = shell("jobs", env={"SEGSCORE_URL": url, "SEGSCORE_API_KEY": keys["viewer"]})
        assert code == 1 and "403" in err and "fit" in err
        with Client(url, key=keys["analyst"]) as api:
            assert len(api.jobs()) == 1                                   # the refused fit made no job
            with pytest.raises(Conflict) as finished:
                api.cancel_job(job["id"])
            assert finished.value.status == 409


def test_the_client_raises_job_failed_with_the_synchronous_detail(tmp_path, iris):
    settings_env = {"SEGSCORE_FIT_TIME_LIMIT_SECONDS": "0.001"}       # no fit can finish in time
    with segscore_server(tmp_path, "--store", str(tmp_path / "store"), settings_env=settings_env) as url:
        with Client(url) as api:
            with pytest.raises(ServerError) as synchronous:
                api.fit("iris", records_from(iris), k=3)
            assert synchronous.value.status == 504
            seen = []
            with pytest.raises(JobFailed) as failed:
                api.fit("iris", records_from(iris), k=3, background=True, progress=lambda *a: seen.append(a))
            assert failed.value.state == "failed"
            assert failed.value.detail == synchronous.value.detail
            assert seen and seen[0][0] == "reading"


def test_a_job_on_one_postgres_replica_is_seen_and_cancelled_through_another(tmp_path, postgres_url):
    """Two server processes on one PostgreSQL store: B sees A's running job and cancels it; A stops the fit (its
    only fit slot is free again: a later job runs there and writes version 1) and the cancelled job never
    writes a version."""
    arguments = ("--backend", "postgres", "--database-url", postgres_url, "--store", str(tmp_path / "artifacts"))
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    values, _ = make_blobs(n_samples=60_000, n_features=8, centers=6, random_state=3)
    slow = csv_path(tmp_path, pd.DataFrame(values, columns=[f"x{j}" for j in range(8)]).to_csv(index=False).encode())
    settings_env = {"SEGSCORE_JOB_LEASE_SECONDS": "3", "SEGSCORE_FIT_CONCURRENCY": "1"}
    with segscore_server(tmp_path / "a", *arguments, settings_env=settings_env) as url_a, \
            segscore_server(tmp_path / "b", *arguments, settings_env=settings_env) as url_b, \
            Client(url_a) as a, Client(url_b) as b:
        job = a.fit("blobs", slow, k=(2, 20), background=True, wait=False)
        wait_for(lambda: b.job(job["id"])["step"].startswith("clustering"), "B to see the job clustering")
        assert [j["id"] for j in b.jobs()] == [job["id"]]
        assert b.cancel_job(job["id"])["state"] == "cancelled"
        small = a.fit("blobs", slow, k=2, background=True, wait=False)   # waits for A's one fit slot
        report = a.follow_job(small["id"])
        assert report["version"] == 1
        assert b.job(job["id"])["state"] == "cancelled" and b.job(job["id"])["version"] is None
        assert [v["version"] for v in b.versions("blobs")] == [1]
