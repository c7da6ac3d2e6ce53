"""The local store: versions, integrity (SHA-256), crash safety, concurrency, restart, cache.

References: hashlib for digests; SQLite's own ``PRAGMA integrity_check``; process crashes are real
(SIGKILL of a child process stopped at a known point of a save, see ``store_child.py``).
"""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import joblib
import numpy as np
import pytest

from service.errors import BundleCorrupt, SegmentationNotFound, SegmentNotFound, StoreUnavailable, VersionNotFound
from service.store import FilesystemStore, ServingCache

REPO = Path(__file__).resolve().parents[2]
CHILD_TIMEOUT = 120


@pytest.fixture
def store(tmp_path):
    return FilesystemStore(tmp_path / "store")


@pytest.fixture(scope="module")
def bundle_file(tmp_path_factory, bundles):
    path = tmp_path_factory.mktemp("bundle") / "bundle.joblib"
    joblib.dump(bundles[1], path)
    return path


def artifact_path(store: FilesystemStore, name: str, version: int) -> Path:
    """The serving artifact (the file whose SHA-256 the index records)."""
    return store.artifact_path(name, version)


def object_files(root: Path) -> list[str]:
    return sorted(p.name for p in (root / "objects").rglob("*") if p.is_file())


def sha256_of(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def flip_a_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 3] ^= 0x01
    path.write_bytes(bytes(data))


# --------------------------------------------------------------------------- basics
def test_save_records_the_sha256_of_the_artifact(store, bundles):
    report = store.save_version("shop", bundles[0], make_live=None)
    assert (report["version"], report["live"]) == (1, True)
    # Reference: hashlib.sha256 of the file as stored.
    assert report["bundle_sha256"] == sha256_of(artifact_path(store, "shop", 1))
    loaded = store.load("shop", 1)
    np.testing.assert_array_equal(loaded.bundle.centroids, bundles[0].centroids)
    assert loaded.bundle.report == bundles[0].report


def test_a_save_leaves_only_numbered_files(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    store.save_version("shop", bundles[1], make_live=None)
    names = sorted(p.name for p in (store.root / "segmentations" / "shop").iterdir())
    assert names == ["v000001.json", "v000002.json"]
    # Artifacts are objects named by their SHA-256 (reference: hashlib of the bytes), two per version.
    expected = sorted(f"{sha256_of(store.artifact_path('shop', v))}.npz" for v in (1, 2)) + \
        sorted(f"{sha256_of(store.fitted_path('shop', v))}.joblib" for v in (1, 2))
    assert object_files(store.root) == sorted(expected)


def test_versions_count_up_per_segmentation(store, bundles):
    assert [store.save_version("a", bundles[0], make_live=None)["version"] for _ in range(3)] == [1, 2, 3]
    assert store.save_version("b", bundles[0], make_live=None)["version"] == 1


def test_lookups_of_unknown_things_raise_not_found(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    with pytest.raises(SegmentationNotFound):
        store.get_segmentation("nobody")
    with pytest.raises(VersionNotFound):
        store.load("shop", 2)
    with pytest.raises(SegmentNotFound):
        store.set_label("shop", 1, 5, "x")


# --------------------------------------------------------------------------- integrity
def test_tampered_artifact_is_a_clear_error_for_that_version_only(tmp_path, bundles):
    store = FilesystemStore(tmp_path / "store")
    for bundle in bundles:
        store.save_version("shop", bundle, make_live=None)
    store.save_version("other", bundles[0], make_live=None)
    flip_a_byte(artifact_path(store, "shop", 1))

    fresh = FilesystemStore(tmp_path / "store")          # nothing cached
    with pytest.raises(BundleCorrupt) as caught:
        fresh.load("shop", 1)
    assert "'shop' version 1" in str(caught.value.detail) and "SHA-256" in str(caught.value.detail)
    # Other versions still load; the tampered version's report (index data) is still readable.
    assert fresh.load("shop", 2).bundle.k == 3
    # 'other' was fitted from the same bytes: one content-addressed file, so the damage is shared.
    assert fresh.artifact_path("other", 1) == fresh.artifact_path("shop", 1)
    assert fresh.version_report("shop", 1)["version"] == 1
    # The error does not stick: each attempt re-verifies (still corrupt, still the same error).
    with pytest.raises(BundleCorrupt):
        fresh.load("shop", 1)


def test_missing_artifact_is_a_clear_error(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    artifact_path(store, "shop", 1).unlink()
    with pytest.raises(BundleCorrupt):
        store.load("shop", 1)


def test_loaded_bundles_are_cached_lru(tmp_path, bundles):
    # The cache sits above the backends (service/store/cache.py).
    store = ServingCache(FilesystemStore(tmp_path / "store"), cache_size=2)
    for _ in range(3):
        store.save_version("shop", bundles[0], make_live=None)
    first = store.load("shop", 1)
    assert store.load("shop", 1) is first
    store.load("shop", 2)
    store.load("shop", 3)                 # evicts version 1 (least recently used)
    assert store.load("shop", 1) is not first


# --------------------------------------------------------------------------- restart
def test_versions_labels_and_live_pointer_survive_a_new_store_instance(tmp_path, bundles):
    store = FilesystemStore(tmp_path / "store")
    for bundle in bundles:
        store.save_version("shop", bundle, make_live=None)
    store.set_live("shop", 2)
    store.set_label("shop", 2, 1, "gift buyers")
    before = store.get_segmentation("shop")
    del store

    restarted = FilesystemStore(tmp_path / "store")
    assert restarted.get_segmentation("shop") == before
    assert restarted.version_report("shop", 2)["segments"][1]["label"] == "gift buyers"
    assert restarted.version_report("shop", 2)["live"] is True
    assert restarted.load("shop", 1).bundle.k == 2
    assert restarted.save_version("shop", bundles[0], make_live=None)["version"] == 3


# --------------------------------------------------------------------------- failures inside a save
def test_an_exception_during_save_leaves_no_version_and_no_files(store, bundles, monkeypatch):
    store.save_version("shop", bundles[0], make_live=None)
    import service.store.filesystem as filesystem

    def broken_dump(value, handle, **kwargs):
        handle.write(b"partial")
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(filesystem.joblib, "dump", broken_dump)
    with pytest.raises(StoreUnavailable) as caught:
        store.save_version("shop", bundles[1], make_live=True)
    assert "'shop'" in str(caught.value.detail)
    monkeypatch.undo()
    assert [v["version"] for v in store.get_segmentation("shop")["versions"]] == [1]
    assert store.get_segmentation("shop")["live_version"] == 1
    assert sorted(p.name for p in (store.root / "segmentations" / "shop").iterdir()) == ["v000001.json"]
    assert len(object_files(store.root)) == 2             # version 1's two objects only
    assert store.save_version("shop", bundles[1], make_live=None)["version"] == 2


class _FailingCommit:
    """A sqlite3 connection whose next COMMIT fails (as a full disk or an I/O error would make it)."""

    def __init__(self, db, state):
        self._db, self._state = db, state

    def execute(self, sql, *args):
        if sql == "COMMIT" and self._state["fail"]:
            self._state["fail"] = False
            raise sqlite3.OperationalError("disk I/O error (simulated)")
        return self._db.execute(sql, *args)

    def __getattr__(self, name):
        return getattr(self._db, name)


def test_a_failed_commit_is_store_unavailable_and_the_next_save_works(store, bundles, monkeypatch):
    # Regression: a COMMIT that raised used to leave the transaction open on the thread's connection, so
    # every later write from that thread failed ("cannot start a transaction within a transaction").
    store.save_version("shop", bundles[0], make_live=None)
    state = {"fail": True}
    real_db = store._db
    monkeypatch.setattr(store, "_db", lambda: _FailingCommit(real_db(), state))
    with pytest.raises(StoreUnavailable) as caught:
        store.save_version("shop", bundles[1], make_live=True)
    assert "'shop'" in str(caught.value.detail)
    assert not real_db().in_transaction
    assert [v["version"] for v in store.get_segmentation("shop")["versions"]] == [1]
    assert store.get_segmentation("shop")["live_version"] == 1
    # Same thread, same connection: the next writes work.
    assert store.save_version("shop", bundles[1], make_live=None)["version"] == 2
    assert store.set_live("shop", 2)["live_version"] == 2
    assert store.load("shop", 2).bundle.k == 3


def test_a_report_with_nan_is_refused_before_anything_is_listed(store, bundles):
    # API.md: numbers in responses are never NaN; a stored NaN would make every later read of the version fail.
    import dataclasses

    broken = dataclasses.replace(bundles[0], report={**bundles[0].report, "inertia": float("nan")})
    with pytest.raises(ValueError):
        store.save_version("shop", broken, make_live=None)
    assert store.list_segmentations() == []
    assert store.save_version("shop", bundles[0], make_live=None)["version"] == 1


# --------------------------------------------------------------------------- crash (SIGKILL) safety
def _run_child(*arguments: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "tests.store.store_child", *arguments], cwd=REPO,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _wait_for(path: Path, process: subprocess.Popen, timeout: float = CHILD_TIMEOUT) -> None:
    deadline = time.monotonic() + timeout
    while not path.exists():
        if process.poll() is not None:
            raise AssertionError(f"child exited early ({process.returncode}): {process.stderr.read()}")
        if time.monotonic() > deadline:
            process.kill()
            process.wait(30)
            raise AssertionError(f"child did not reach its hold point within {timeout} s")
        time.sleep(0.02)


@pytest.mark.parametrize("point", ["object-fsync", "artifact-renamed", "report-renamed", "commit"])
def test_a_save_killed_mid_write_leaves_the_store_readable(tmp_path, bundles, bundle_file, point):
    root = tmp_path / "store"
    store = FilesystemStore(root)
    store.save_version("crash", bundles[0], make_live=None)
    before = store.get_segmentation("crash")

    signal_file = tmp_path / "holding"
    child = _run_child("crash", str(root), str(bundle_file), point, str(signal_file))
    try:
        _wait_for(signal_file, child)
        os.kill(child.pid, signal.SIGKILL)
    finally:
        child.wait(30)
        child.stdout.close()
        child.stderr.close()
    assert child.returncode == -signal.SIGKILL
    # The crash really happened where intended: it left files behind that no index row points to.
    leftovers = {p.name for p in (root / "segmentations" / "crash").iterdir()}
    objects = object_files(root)
    if point == "object-fsync":
        assert any(name.startswith(".tmp-") for name in objects), objects
    elif point == "artifact-renamed":
        assert len(objects) == 4, objects             # version 1's two objects and the new two, named by nothing
    else:
        assert "v000002.json" in leftovers, leftovers

    # Readable by a new instance (as after a restart): no partial version is listed.
    after = FilesystemStore(root)
    assert after.get_segmentation("crash") == before
    assert [r["latest_version"] for r in after.list_segmentations()] == [1]
    assert after.load("crash", 1).bundle.k == 2
    # SQLite's own check of the index (reference: PRAGMA integrity_check).
    with sqlite3.connect(root / "index.sqlite3") as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    # The next save works, gets the next unused number, and its artifact verifies (any file the crash left
    # under that number was replaced).
    report = after.save_version("crash", bundles[1], make_live=None)
    assert report["version"] == 2 and report["live"] is False
    assert report["bundle_sha256"] == sha256_of(artifact_path(after, "crash", 2))
    assert FilesystemStore(root).load("crash", 2).bundle.k == 3


# --------------------------------------------------------------------------- concurrency
def run_at_once(tmp_path: Path, commands: list[list[str]]) -> list[int]:
    """Start one child per command (each gets READY_FILE GO_FILE appended), release them together once all are
    ready, and return the number each printed."""
    go = tmp_path / "go"
    children = []
    try:
        for i, command in enumerate(commands):
            ready = tmp_path / f"ready-{i}"
            children.append((ready, _run_child(*command, str(ready), str(go))))
        for ready, child in children:
            _wait_for(ready, child)
        go.write_text("go")
        outputs = []
        for _, child in children:
            out, err = child.communicate(timeout=CHILD_TIMEOUT)
            assert child.returncode == 0, err
            outputs.append(int(out.strip()))
    finally:
        for _, child in children:
            if child.poll() is None:
                child.kill()
                child.wait(30)
    return outputs


def test_ten_processes_saving_to_one_name_get_versions_1_to_10(tmp_path, bundle_file):
    root = tmp_path / "store"                   # not created yet: the ten processes race to create it too
    outputs = run_at_once(tmp_path, [["save", str(root), str(bundle_file), "shop"]] * 10)
    assert sorted(outputs) == list(range(1, 11))
    store = FilesystemStore(root)
    detail = store.get_segmentation("shop")
    assert [v["version"] for v in detail["versions"]] == list(range(1, 11))
    assert detail["live_version"] == 1
    for version in range(1, 11):
        assert store.load("shop", version).version == version


def test_ten_threads_saving_to_one_store_get_versions_1_to_10(store, bundles):
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=10) as pool:
        versions = list(pool.map(lambda i: store.save_version("shop", bundles[i % 2], make_live=None)["version"],
                                 range(10)))
    assert sorted(versions) == list(range(1, 11))


def test_opening_a_store_removes_old_crash_leftovers_only(tmp_path):
    # Files a SIGKILLed writer leaves (temp and staged artifacts) are never listed; an old one is deleted
    # when a store opens, a fresh one is kept because another process may still be writing it.
    import os
    import time

    root = tmp_path / "store"
    FilesystemStore(root)
    folder = root / "segmentations" / "shop"
    folder.mkdir(parents=True)
    old_tmp, old_staged, fresh = folder / ".tmp-a.joblib", folder / ".staged-b.joblib", folder / ".tmp-c.json"
    (root / "objects" / "ab").mkdir(parents=True)
    old_object, fresh_object = root / "objects" / "ab" / ".tmp-d.npz", root / "objects" / "ab" / ".tmp-e.npz"
    for path in (old_tmp, old_staged, fresh, old_object, fresh_object):
        path.write_bytes(b"partial")
    two_hours_ago = time.time() - 7200
    for path in (old_tmp, old_staged, old_object):
        os.utime(path, (two_hours_ago, two_hours_ago))
    FilesystemStore(root)
    assert not old_tmp.exists() and not old_staged.exists() and not old_object.exists()
    assert fresh.exists() and fresh_object.exists()


def test_shared_objects_are_deleted_with_the_last_version_that_names_them(store, bundles):
    store.save_version("a", bundles[0], make_live=None)
    store.save_version("a", bundles[1], make_live=None)
    store.save_version("b", bundles[0], make_live=None)         # the same bytes as a/1: the same objects
    shared, own = store.artifact_path("a", 1), store.artifact_path("a", 2)
    assert store.artifact_path("b", 1) == shared and len(object_files(store.root)) == 4
    store.delete_version("a", 2)
    assert not own.exists() and shared.exists()
    store.delete_segmentation("a")
    assert shared.exists() and store.load("b", 1).bundle.k == 2  # b still names them
    store.delete_segmentation("b")
    assert object_files(store.root) == []
