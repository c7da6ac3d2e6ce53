"""Background fits (``POST .../fit?background=true``) and the job routes, on both store backends.

Every state and transition of a job is driven here through the HTTP app: queued -> running -> done; failed (a
refusal, with the synchronous fit's detail; a server that stops); cancelled while queued, while running and
while saving (never a version); 409 on a finished job. Where a job must be caught in one step, the test holds
the server's job thread at that step (a gate around one store call) and lets it go after acting: no sleeps,
no timed assertions. Iris (scikit-learn's copy of Fisher's data) is the training data throughout.
"""

from __future__ import annotations

import os
import re
import threading
import time
from contextlib import contextmanager

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.fitting import running_fit_workers
from service.jobs import runner as job_runner
from service.store.filesystem import utc_now
from tests.conftest import records_from, until_finished

NAME = "shop"
JOB_FIELDS = {"id", "segmentation", "state", "step", "progress", "version", "error", "created_at", "updated_at"}
STEP = re.compile(r"reading|scaling|reducing|clustering k=\d+|profiling|saving")
WAIT_SECONDS = 180          # an upper bound for a job on a busy machine, not a measured time


def wait_for(predicate, what: str):
    deadline = time.monotonic() + WAIT_SECONDS
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"gave up waiting for {what}")


def body(iris, **params):
    return {"records": records_from(iris), "k": {"min": 2, "max": 4}, "seed": 7, **params}


def start(client, iris, name=NAME, **params):
    answer = client.post(f"/v1/segmentations/{name}/fit?background=true", json=body(iris, **params))
    assert answer.status_code == 202, answer.text
    return answer


@pytest.fixture
def bundles(iris):
    """Two small iris bundles (k = 2 and k = 3), fitted in this process."""
    from service.core.bundle import FitConfig
    from service.core.fit import fit_bundle

    def one(k):
        return fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=k, k_max=k, k_fixed=True))
    return one(2), one(3)


@pytest.fixture(autouse=True)
def every_progress_message_written(monkeypatch):
    """Write every progress message of the worker (the server throttles them), so each step is seen."""
    monkeypatch.setattr(job_runner, "PROGRESS_WRITE_SECONDS", 0.0)


@contextmanager
def app_client(settings, **changes):
    with TestClient(create_app(settings.model_copy(update=changes))) as client:
        yield client


@pytest.fixture
def client(store_settings):
    with app_client(store_settings) as opened:
        yield opened


class Gate:
    """Holds the job thread inside one store method until ``release``; ``reached`` is set when it arrives.

    ``when(*args)`` picks the call to hold (the first match only)."""

    def __init__(self, store, method: str, when=lambda *args, **kwargs: True) -> None:
        self.reached, self.release = threading.Event(), threading.Event()
        self._original = getattr(store, method)
        self._when, self._armed = when, True

        def gated(*args, **kwargs):
            if self._armed and self._when(*args, **kwargs):
                self._armed = False
                self.reached.set()
                assert self.release.wait(WAIT_SECONDS), "the test never released the gate"
            return self._original(*args, **kwargs)

        setattr(store, method, gated)

    def wait(self) -> None:
        assert self.reached.wait(WAIT_SECONDS), "the job never reached the gate"


def at_step(prefix):
    return lambda job_id, step, progress: step.startswith(prefix)


# ----------------------------------------------------------------------------------------- the happy path
def test_a_background_fit_answers_202_with_the_job_and_its_location(client, iris):
    answer = start(client, iris)
    job = answer.json()
    assert set(job) == JOB_FIELDS
    assert answer.headers["location"] == f"/v1/jobs/{job['id']}"
    assert (job["segmentation"], job["state"], job["step"], job["progress"]) == (NAME, "queued", "reading", 0.0)
    assert job["version"] is None and job["error"] is None
    assert client.get(answer.headers["location"]).json()["id"] == job["id"]
    done = until_finished(client, job["id"])
    assert (done["state"], done["progress"], done["version"], done["error"]) == ("done", 1.0, 1, None)
    assert client.get(f"/v1/segmentations/{NAME}").json()["live_version"] == 1
    assert client.get(f"/v1/jobs/{job['id']}/report").json() == client.get(
        f"/v1/segmentations/{NAME}/versions/1").json()


def test_a_job_that_is_not_done_has_no_report(client, iris):
    gate = Gate(client.app.state.store, "job_progress", at_step("clustering"))
    job = start(client, iris).json()
    gate.wait()
    answer = client.get(f"/v1/jobs/{job['id']}/report")
    assert answer.status_code == 409 and "running" in answer.json()["detail"]
    client.delete(f"/v1/jobs/{job['id']}")
    gate.release.set()
    assert client.get(f"/v1/jobs/{job['id']}/report").status_code == 409


def test_a_background_fit_stores_the_same_version_content_as_a_synchronous_one(client, iris):
    synchronous = client.post("/v1/segmentations/sync/fit", json=body(iris))
    assert synchronous.status_code == 201, synchronous.text
    job = until_finished(client, start(client, iris, name="background").json()["id"])
    background = client.get(f"/v1/segmentations/background/versions/{job['version']}").json()
    identity = {"name", "version", "created_at"}
    assert background["data_sha256"] == synchronous.json()["data_sha256"]
    assert background["segments"] == synchronous.json()["segments"]
    assert ({k: v for k, v in background.items() if k not in identity}
            == {k: v for k, v in synchronous.json().items() if k not in identity})


def test_a_csv_background_fit_takes_its_parameters_from_the_query(client, iris):
    import pandas as pd

    csv = pd.DataFrame(iris.data, columns=iris.feature_names).to_csv(index=False)
    answer = client.post(f"/v1/segmentations/{NAME}/fit?background=true&k=3&components=none", content=csv,
                         headers={"Content-Type": "text/csv"})
    assert answer.status_code == 202, answer.text
    job = until_finished(client, answer.json()["id"])
    report = client.get(f"/v1/segmentations/{NAME}/versions/{job['version']}").json()
    assert (report["k"], report["components"]) == (3, None)


def test_steps_are_named_and_progress_never_goes_back(client, iris):
    store = client.app.state.store
    seen = []
    original = store.job_progress

    def recording(job_id, step, progress):
        state = original(job_id, step, progress)
        seen.append(store.job(job_id))
        return state

    store.job_progress = recording
    job = until_finished(client, start(client, iris, k={"min": 2, "max": 5}).json()["id"])
    steps = [row["step"] for row in seen]
    assert all(STEP.fullmatch(step) for step in steps), steps
    assert steps[0] == "reading" and steps[-1] == "saving"
    assert [s for s in steps if s.startswith("clustering")] == [f"clustering k={k}" for k in range(2, 6)]
    assert steps.index("scaling") < steps.index("reducing") < steps.index("clustering k=2") < steps.index("profiling")
    fractions = [row["progress"] for row in seen] + [job["progress"]]
    assert fractions == sorted(fractions) and all(0 <= f < 1 for f in fractions[:-1]) and fractions[-1] == 1.0
    assert {row["state"] for row in seen} == {"running"}


def test_jobs_are_listed_newest_first_by_segmentation_and_limited(client, iris):
    first = until_finished(client, start(client, iris, name="a").json()["id"])
    second = until_finished(client, start(client, iris, name="b").json()["id"])
    third = until_finished(client, start(client, iris, name="a").json()["id"])
    assert [j["id"] for j in client.get("/v1/jobs").json()["jobs"]] == [third["id"], second["id"], first["id"]]
    assert [j["id"] for j in client.get("/v1/jobs?segmentation=a").json()["jobs"]] == [third["id"], first["id"]]
    assert [j["id"] for j in client.get("/v1/jobs?limit=1").json()["jobs"]] == [third["id"]]
    assert client.get("/v1/jobs?limit=0").status_code == 422
    assert client.get("/v1/jobs?segmentation=Not%20A%20Name").status_code == 422


@pytest.mark.parametrize("job_id", ["0" * 32, "not-a-job", "A" * 32])
def test_an_unknown_job_is_404(client, job_id):
    for method in ("GET", "DELETE"):
        answer = client.request(method, f"/v1/jobs/{job_id}")
        assert answer.status_code == 404 and answer.json()["detail"]


# ----------------------------------------------------------------------------------------- refusals
BAD_REQUESTS = {
    "bad name": ("/v1/segmentations/Not A Name/fit", {"json": {"records": [{"a": 1.0}, {"a": 2.0}]}}),
    "k over the limit": (f"/v1/segmentations/{NAME}/fit", {"json": {"records": [{"a": 1.0}, {"a": 2.0}], "k": 999}}),
    "k above the distinct records": (f"/v1/segmentations/{NAME}/fit",
                                     {"json": {"records": [{"a": 1.0}, {"a": 2.0}] * 2, "k": 3,
                                               "features": ["a"], "components": None}}),
    "not JSON": (f"/v1/segmentations/{NAME}/fit", {"content": b"{records", "headers": {"Content-Type": "application/json"}}),
    "unknown body key": (f"/v1/segmentations/{NAME}/fit", {"json": {"records": [{"a": 1.0}, {"a": 2.0}], "kk": 2}}),
    "query beside JSON": (f"/v1/segmentations/{NAME}/fit?k=3", {"json": {"records": [{"a": 1.0}, {"a": 2.0}]}}),
    "unknown CSV query": (f"/v1/segmentations/{NAME}/fit?kay=3", {"content": b"a,b\n1,2\n3,4\n",
                                                                  "headers": {"Content-Type": "text/csv"}}),
    "no records": (f"/v1/segmentations/{NAME}/fit", {"json": {"records": []}}),
    "media type": (f"/v1/segmentations/{NAME}/fit", {"content": b"a", "headers": {"Content-Type": "text/plain"}}),
    "constant named feature": (f"/v1/segmentations/{NAME}/fit",
                               {"json": {"records": [{"a": 1.0, "b": i} for i in range(5)], "features": ["a", "b"],
                                         "k": 2}}),
}


@pytest.mark.parametrize("case", sorted(BAD_REQUESTS))
def test_a_bad_request_is_refused_at_once_like_a_synchronous_fit_and_makes_no_job(client, case):
    path, request = BAD_REQUESTS[case]
    synchronous = client.post(path, **request)
    assert 400 <= synchronous.status_code < 500, synchronous.text
    separator = "&" if "?" in path else "?"
    background = client.post(f"{path}{separator}background=true", **request)
    assert (background.status_code, background.json()) == (synchronous.status_code, synchronous.json())
    assert client.get("/v1/jobs").json()["jobs"] == []


def test_a_misspelt_background_flag_is_refused(client, iris):
    answer = client.post(f"/v1/segmentations/{NAME}/fit?background=maybe", json=body(iris))
    assert answer.status_code == 422
    assert client.get("/v1/jobs").json()["jobs"] == []


def test_a_fit_that_fails_in_its_worker_fails_the_job_with_the_synchronous_detail(store_settings, iris):
    # A time limit no fit can meet: the synchronous fit answers 504 with a detail; the job keeps the same one.
    with app_client(store_settings, fit_time_limit_seconds=0.001) as client:
        synchronous = client.post(f"/v1/segmentations/{NAME}/fit", json=body(iris))
        assert synchronous.status_code == 504
        job = until_finished(client, start(client, iris).json()["id"])
        assert (job["state"], job["version"]) == ("failed", None)
        assert job["error"] == synchronous.json()["detail"]
        assert job["progress"] < 1
        assert client.get(f"/v1/segmentations/{NAME}").status_code == 404


# ----------------------------------------------------------------------------------------- cancel
def test_cancel_a_running_job_stops_its_worker_and_writes_no_version(client, iris):
    gate = Gate(client.app.state.store, "job_progress", at_step("clustering"))
    job = start(client, iris).json()
    gate.wait()
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "running"
    workers = running_fit_workers()
    assert len(workers) == 1
    cancelled = client.delete(f"/v1/jobs/{job['id']}")
    assert cancelled.status_code == 200, cancelled.text
    assert cancelled.json()["state"] == "cancelled" and set(cancelled.json()) == JOB_FIELDS
    gate.release.set()
    wait_for(lambda: not running_fit_workers(), "the worker to stop")
    with pytest.raises(ProcessLookupError):
        os.kill(workers[0], 0)                         # killed and reaped
    wait_for(lambda: not client.app.state.jobs._local, "the job thread to end")
    final = client.get(f"/v1/jobs/{job['id']}").json()
    assert (final["state"], final["version"], final["error"]) == ("cancelled", None, None)
    assert final["progress"] < 1
    assert client.get(f"/v1/segmentations/{NAME}").status_code == 404


def test_cancel_a_queued_job_it_never_runs(store_settings, iris):
    with app_client(store_settings, fit_concurrency=1) as client:
        gate = Gate(client.app.state.store, "job_progress", at_step("clustering"))
        first = start(client, iris).json()
        gate.wait()                                     # the only fit slot is taken
        second = start(client, iris).json()
        assert client.get(f"/v1/jobs/{second['id']}").json()["state"] == "queued"
        cancelled = client.delete(f"/v1/jobs/{second['id']}")
        assert cancelled.status_code == 200 and cancelled.json()["state"] == "cancelled"
        gate.release.set()
        assert until_finished(client, first["id"])["state"] == "done"
        wait_for(lambda: not client.app.state.jobs._local, "every job task to end")
        final = client.get(f"/v1/jobs/{second['id']}").json()
        assert (final["state"], final["step"], final["progress"], final["version"]) == ("cancelled", "reading", 0.0,
                                                                                       None)
        assert [v["version"] for v in client.get(f"/v1/segmentations/{NAME}").json()["versions"]] == [1]


def test_cancel_during_saving_writes_no_version(client, iris):
    gate = Gate(client.app.state.store, "save_version")
    job = start(client, iris).json()
    gate.wait()                                         # the fit is done; the server is about to write
    during = client.get(f"/v1/jobs/{job['id']}").json()
    assert (during["state"], during["step"]) == ("running", "saving")
    cancelled = client.delete(f"/v1/jobs/{job['id']}")
    assert cancelled.status_code == 200 and cancelled.json()["state"] == "cancelled"
    gate.release.set()
    wait_for(lambda: not client.app.state.jobs._local, "the job thread to end")
    final = client.get(f"/v1/jobs/{job['id']}").json()
    assert (final["state"], final["version"]) == ("cancelled", None)
    assert client.get(f"/v1/segmentations/{NAME}").status_code == 404
    assert client.get("/v1/segmentations").json()["segmentations"] == []


def test_the_version_write_refuses_a_job_cancelled_after_it_was_claimed(store_settings, bundles):
    """The store level of the saving race: the state check sits inside the version's own transaction."""
    from service.errors import JobNotRunning
    from service.store import open_store

    store = open_store(store_settings)
    try:
        job = store.create_job(NAME, owner="me")
        assert store.job_progress(job["id"], "saving", 0.95) == "running"
        store.cancel_job(job["id"])
        with pytest.raises(JobNotRunning):
            store.save_version(NAME, bundles[0], make_live=None, job_id=job["id"])
        assert store.list_segmentations() == []
        other = store.create_job(NAME, owner="me")
        store.job_progress(other["id"], "saving", 0.95)
        report = store.save_version(NAME, bundles[0], make_live=None, job_id=other["id"])
        assert store.job(other["id"])["version"] == report["version"] == 1
        assert store.job(other["id"])["state"] == "done"
    finally:
        store.close()


def test_a_finished_job_cannot_be_cancelled(store_settings, iris):
    with app_client(store_settings) as client:
        done = until_finished(client, start(client, iris).json()["id"])
        gate = Gate(client.app.state.store, "job_progress", at_step("clustering"))
        running = start(client, iris).json()
        gate.wait()
        client.delete(f"/v1/jobs/{running['id']}")
        gate.release.set()
    with app_client(store_settings, fit_time_limit_seconds=0.001) as client:
        failed = until_finished(client, start(client, iris).json()["id"])
        for job, state in ((done, "done"), (running, "cancelled"), (failed, "failed")):
            answer = client.delete(f"/v1/jobs/{job['id']}")
            assert answer.status_code == 409, answer.text
            assert state in answer.json()["detail"]
            assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == state


# ----------------------------------------------------------------------------------------- servers stopping
def test_a_server_that_stops_marks_its_running_jobs_failed(store_settings, iris):
    with app_client(store_settings) as client:
        gate = Gate(client.app.state.store, "job_progress", at_step("clustering"))
        job = start(client, iris).json()
        gate.wait()
        store = client.app.state.store
        marking = store.fail_owned_jobs

        def mark_then_release(*args):
            count = marking(*args)
            gate.release.set()          # the job thread goes on only once the shutdown has marked it failed
            return count

        store.fail_owned_jobs = mark_then_release
    with app_client(store_settings) as client:
        final = client.get(f"/v1/jobs/{job['id']}").json()
        assert (final["state"], final["version"]) == ("failed", None)
        assert "stopped" in final["error"]
        assert client.get(f"/v1/segmentations/{NAME}").status_code == 404


def test_jobs_whose_server_stopped_beating_are_failed_by_another_server(store_settings):
    from service.store import open_store

    store = open_store(store_settings)
    try:
        old = store.create_job(NAME, owner="gone-server")
        fresh = store.create_job(NAME, owner="live-server")
        store.job_progress(old["id"], "clustering k=3", 0.3)
        later = utc_now()
        store.heartbeat_jobs("live-server")
        assert store.fail_abandoned_jobs(alive_owner="me", heartbeat_before=later, error="stopped") == 1
        assert store.job(old["id"])["state"] == "failed" and store.job(old["id"])["error"] == "stopped"
        assert store.job(fresh["id"])["state"] == "queued"
        # A server never fails its own jobs this way, however old their heartbeat.
        assert store.fail_abandoned_jobs(alive_owner="live-server", heartbeat_before=utc_now(), error="x") == 0
    finally:
        store.close()


def test_a_job_started_on_one_replica_is_read_and_cancelled_through_another(store_settings, iris):
    with app_client(store_settings) as first, app_client(store_settings) as second:
        gate = Gate(first.app.state.store, "job_progress", at_step("clustering"))
        job = start(first, iris).json()
        gate.wait()
        assert second.get(f"/v1/jobs/{job['id']}").json()["state"] == "running"
        assert [j["id"] for j in second.get("/v1/jobs").json()["jobs"]] == [job["id"]]
        assert second.delete(f"/v1/jobs/{job['id']}").json()["state"] == "cancelled"
        gate.release.set()                # the owner learns it from its next progress write and stops the worker
        wait_for(lambda: not first.app.state.jobs._local, "the owner's job thread to end")
        assert first.get(f"/v1/jobs/{job['id']}").json()["state"] == "cancelled"
        assert first.get(f"/v1/segmentations/{NAME}").status_code == 404
