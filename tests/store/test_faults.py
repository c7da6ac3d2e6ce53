"""Faults: SIGKILL at random moments of store writes (20 times each), and two processes promoting at once.

The killed process (forked from the test process, so that 20 kills do not pay 20 interpreter start-ups) runs
the store's own write path with a store instance of its own, the part of the server that writes:
since fits now run in worker processes and the server writes their results, a server killed during a fit
dies either in the worker (nothing of the store touched: ``tests/api/test_fit_workers.py``) or in this write
path. Each kill lands at a random moment of a loop of writes, so across 20 kills it hits different steps
(temporary files, renames, the index transaction). Reference: SQLite's ``PRAGMA integrity_check``; the
child's own log of what it saw committed.
"""

from __future__ import annotations

import os
import random
import signal
import sqlite3
import time
import uuid
from pathlib import Path

from service.store import FilesystemStore
from tests.store.test_filesystem import CHILD_TIMEOUT, artifact_path, run_at_once, sha256_of

KILLS = 20


def kill_at_random(write_forever, started: Path, rng: random.Random, max_delay: float) -> None:
    """Fork a child that runs ``write_forever()``; once it has committed at least once, SIGKILL it at a random
    moment."""
    pid = os.fork()
    if pid == 0:                                         # the child: write until killed, never return to pytest
        try:
            write_forever()
        finally:
            os._exit(3)
    try:
        deadline = time.monotonic() + CHILD_TIMEOUT
        while not (started.exists() and started.stat().st_size > 0):
            done, status = os.waitpid(pid, os.WNOHANG)
            if done:
                raise AssertionError(f"child exited early (status {status})")
            assert time.monotonic() < deadline, "the child never committed a write"
            time.sleep(0.005)
        time.sleep(rng.uniform(0, max_delay))
    finally:
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
    assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL


def save_forever(root: Path, bundle, log: Path):
    def run() -> None:
        store = FilesystemStore(root)
        with open(log, "a") as handle:
            while True:
                handle.write(f"{store.save_version('loop', bundle, make_live=None)['version']}\n")
                handle.flush()
    return run


def drift_forever(root: Path, log: Path):
    def run() -> None:
        store = FilesystemStore(root)
        with open(log, "a") as handle:
            while True:
                report_id = uuid.uuid4().hex
                store.save_drift_report({"id": report_id, "name": "loop", "version": 1,
                                         "created_at": "2026-01-01T00:00:00Z", "items": [0.5] * 200})
                handle.write(f"{report_id}\n")
                handle.flush()
    return run


def assert_index_intact(root: Path) -> None:
    with sqlite3.connect(root / "index.sqlite3") as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_sigkill_during_version_writes_20_times(tmp_path, bundles):
    root = tmp_path / "store"
    FilesystemStore(root).save_version("loop", bundles[0], make_live=None)
    rng = random.Random(9)
    for attempt in range(KILLS):
        log = tmp_path / f"versions-{attempt}.log"
        kill_at_random(save_forever(root, bundles[attempt % 2], log), log, rng, max_delay=0.3)
        committed = {int(line) for line in log.read_text().split()}
        store = FilesystemStore(root)                    # opens after the crash
        assert_index_intact(root)
        listed = [v["version"] for v in store.get_segmentation("loop")["versions"]]
        assert listed == list(range(1, len(listed) + 1))  # nothing half-written listed, no gap
        assert committed <= set(listed)                   # every commit the writer saw survived
        for version in listed:                            # and every listed version is whole
            report = store.version_report("loop", version)
            assert report["bundle_sha256"] == sha256_of(artifact_path(store, "loop", version))
            assert store.load("loop", version).bundle.k in (2, 3)
    assert len(listed) > KILLS                            # the children did commit between kills


def test_sigkill_during_drift_report_writes_20_times(tmp_path, bundles):
    root = tmp_path / "store"
    FilesystemStore(root).save_version("loop", bundles[0], make_live=None)
    rng = random.Random(10)
    every_committed: set[str] = set()
    for attempt in range(KILLS):
        log = tmp_path / f"reports-{attempt}.log"
        kill_at_random(drift_forever(root, log), log, rng, max_delay=0.1)
        every_committed |= set(log.read_text().split())
        store = FilesystemStore(root)
        assert_index_intact(root)
        stored = store.list_drift_reports("loop", version=None, limit=10**9)
        assert every_committed <= {r["id"] for r in stored}     # zero lost reports
        assert all(r["items"] == [0.5] * 200 for r in stored)  # none half-written
    assert len(every_committed) > KILLS


def test_two_processes_promoting_at_once_leave_one_valid_pointer(tmp_path, bundles):
    root = tmp_path / "store"
    store = FilesystemStore(root)
    for bundle in (bundles[0], bundles[1], bundles[0]):
        store.save_version("shop", bundle, make_live=None)
    answers = run_at_once(tmp_path, [["promote", str(root), "shop", "2"], ["promote", str(root), "shop", "3"]])
    assert set(answers) <= {2, 3}
    after = FilesystemStore(root).get_segmentation("shop")
    assert after["live_version"] in (2, 3)                       # one wins
    assert [v["live"] for v in after["versions"]].count(True) == 1
    assert FilesystemStore(root).load("shop", after["live_version"]).version == after["live_version"]
    assert_index_intact(root)
