"""Faults with two real ``segscore serve`` replicas on one PostgreSQL schema and one artifact directory.

- One replica killed (SIGKILL) in the middle of a fit: the other keeps answering assigns without a failure,
  the store stays consistent (the unfinished fit is listed nowhere, earlier versions are intact and served)
  and the next fit gets the next unused version number.
- The database cut off (tests/tcp_proxy.py between both replicas and PostgreSQL: open connections dropped,
  new ones refused) while assigns run on both: no assign fails, writes answer 503 with a detail that names
  the database, /readyz says "unavailable", and both recover by themselves when the connection is restored.

Deadlines only guard against a hang (no timed assertions).
"""

from __future__ import annotations

import os
import signal
import threading
import time
from contextlib import ExitStack, contextmanager
from urllib.parse import urlsplit, urlunsplit

import httpx2
from sklearn.datasets import load_digits

from tests.conftest import fresh_schema_url, records_from
from tests.serving import fit_workers_under, segscore_command, start_server, stop_process
from tests.tcp_proxy import CuttableProxy

DEADLINE = 120.0


def wait_until(check, what: str):
    started = time.monotonic()
    while not (outcome := check()):
        assert time.monotonic() - started < DEADLINE, f"{what}: not seen after {DEADLINE} s"
        time.sleep(0.05)
    return outcome


@contextmanager
def two_replicas(tmp_path, database_url: str):
    """Replicas A and B: (process, client) pairs; each stopped at the end unless already gone."""
    arguments = ("--backend", "postgres", "--database-url", database_url, "--store", str(tmp_path / "artifacts"))
    with ExitStack() as stack:
        replicas = []
        for name in ("a", "b"):
            (tmp_path / name).mkdir()
            process, base = start_server(segscore_command(*arguments), tmp_path / name,
                                         settings_env={"SEGSCORE_DATABASE_TIMEOUT_SECONDS": "1"})
            stack.callback(lambda p=process: p.poll() is None and stop_process(p))
            replicas.append((process, stack.enter_context(httpx2.Client(base_url=base, timeout=DEADLINE))))
        yield replicas


class AssignLoop:
    """Single-record assigns, one after another, on a thread, until stopped; keeps every non-200 answer."""

    def __init__(self, client: httpx2.Client, records: list[dict]) -> None:
        self.client, self.records = client, records
        self.done = 0
        self.failures: list[str] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run)
        self._thread.start()

    def _run(self) -> None:
        i = 0
        while not self._stop.is_set():
            try:
                answer = self.client.post("/v1/segmentations/shop/assign", json={"records": [self.records[i]]})
                if answer.status_code != 200:
                    self.failures.append(f"{time.monotonic():.2f} {answer.status_code}: {answer.text}")
            except httpx2.HTTPError as exc:
                self.failures.append(repr(exc))
            self.done += 1
            i = (i + 1) % len(self.records)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(DEADLINE)


def test_a_replica_killed_mid_fit_leaves_the_other_serving_and_the_store_consistent(tmp_path, iris):
    records = records_from(iris)
    with fresh_schema_url() as url, two_replicas(tmp_path, url) as ((process_a, a), (_, b)):
        assert a.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
        before = wait_until(lambda: (r := b.post("/v1/segmentations/shop/assign", json={"records": records}))
                            .status_code == 200 and r.json(), "version 1 on B")
        loop = AssignLoop(b, records)
        try:
            # A fit of a few seconds through A (scikit-learn's digits, a k range with many inits) ...
            digits = {"records": records_from(load_digits()), "k": {"min": 2, "max": 12}, "n_init": 30}
            outcome = {}

            def fit_through_a():
                try:
                    outcome["answer"] = a.post("/v1/segmentations/digits/fit", json=digits)
                except httpx2.HTTPError as exc:
                    outcome["error"] = exc
            fit = threading.Thread(target=fit_through_a)
            fit.start()
            workers = wait_until(lambda: fit_workers_under(process_a.pid), "A's fit worker")
            # ... and A killed while it runs. (Its orphaned fit worker is ended too: nothing would read it.)
            process_a.kill()
            process_a.wait(DEADLINE)
            for pid in workers:
                try:
                    os.kill(pid, signal.SIGKILL)
                except ProcessLookupError:
                    pass
            fit.join(DEADLINE)
            assert "error" in outcome and "answer" not in outcome
            done_at_kill = loop.done
            wait_until(lambda: loop.done >= done_at_kill + 50, "assigns on B after A was killed")
        finally:
            loop.stop()
        assert loop.failures == [] and loop.done > 0

        # Nothing of the unfinished fit is listed; version 1 is intact and still answers the same.
        assert "digits" not in {row["name"] for row in b.get("/v1/segmentations").json()["segmentations"]}
        assert b.get("/v1/segmentations/digits").status_code == 404
        shop = b.get("/v1/segmentations/shop").json()
        assert [v["version"] for v in shop["versions"]] == [1] and shop["live_version"] == 1
        assert b.post("/v1/segmentations/shop/assign?version=1", json={"records": records}).json() == before
        # The next fits get fresh, unique numbers.
        for expected in (2, 3):
            answer = b.post("/v1/segmentations/shop/fit", json={"records": records, "k": 2})
            assert answer.status_code == 201 and answer.json()["version"] == expected
        assert b.post("/v1/segmentations/digits/fit", json={**digits, "k": 3, "n_init": 1}).json()["version"] == 1


def test_a_database_outage_with_assigns_running_on_both_replicas(tmp_path, iris):
    records = records_from(iris)
    with ExitStack() as stack:
        url = stack.enter_context(fresh_schema_url())
        parts = urlsplit(url)
        proxy = CuttableProxy(parts.hostname, parts.port or 5432)
        stack.callback(proxy.close)
        netloc = f"{parts.username + '@' if parts.username else ''}127.0.0.1:{proxy.port}"
        replicas = stack.enter_context(two_replicas(tmp_path, urlunsplit(parts._replace(netloc=netloc))))
        (_, a), (_, b) = replicas
        assert a.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
        wait_until(lambda: b.post("/v1/segmentations/shop/assign", json={"records": records[:1]}).status_code
                   == 200, "version 1 on B")

        loops = [AssignLoop(client, records) for client in (a, b)]
        try:
            wait_until(lambda: all(loop.done >= 20 for loop in loops), "assigns running on both")
            proxy.cut()
            at_cut = [loop.done for loop in loops]
            for client in (a, b):
                label = client.patch("/v1/segmentations/shop/versions/1/segments/0", json={"label": "x"})
                assert label.status_code == 503
                assert "store database is unavailable" in str(label.json()["detail"])
                fit = client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 2})
                assert fit.status_code == 503 and "store database is unavailable" in str(fit.json()["detail"])
                ready = client.get("/readyz")
                assert ready.status_code == 503 and ready.json()["status"] == "unavailable"
            # Assigns keep going on both through the outage (and the background checks failing meanwhile).
            wait_until(lambda: all(loop.done >= n + 100 for loop, n in zip(loops, at_cut)), "assigns during the cut")

            proxy.restore()
            for client in (a, b):
                wait_until(lambda: client.get("/readyz").status_code == 200, "readiness after the outage")
            assert a.patch("/v1/segmentations/shop/versions/1/segments/0", json={"label": "x"}).status_code == 200
            assert b.post("/v1/segmentations/shop/fit", json={"records": records, "k": 2}).json()["version"] == 2
            # The label written through A reaches B (its watcher is back too).
            wait_until(lambda: any(r["label"] == "x" for r in b.post(
                "/v1/segmentations/shop/assign", json={"records": records}).json()["results"]), "the label on B")
        finally:
            for loop in loops:
                loop.stop()
        for loop in loops:
            assert loop.failures == [] and loop.done > 0
