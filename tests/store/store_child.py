"""Child processes for the store tests (run as ``python -m tests.store.store_child ...``; not a test module).

``crash STORE BUNDLE POINT SIGNAL_FILE``
    Save BUNDLE as the next version of 'crash', but stop at POINT: write SIGNAL_FILE, then sleep until the
    parent SIGKILLs the process. Points:
      dump              half-way through writing the artifact's temporary file
      artifact-renamed  the artifact is renamed to its numbered name (index write lock held), report not yet
      report-renamed    artifact and report are in place; the index rows are not committed yet
      commit            the index rows are inserted; COMMIT has not run

``promote STORE NAME VERSION READY_FILE GO_FILE``
    Write READY_FILE, wait (bounded) for GO_FILE, make VERSION of NAME live, print the live version read back.

``save STORE BUNDLE NAME READY_FILE GO_FILE``
    Write READY_FILE, wait (bounded) for GO_FILE, then open the store (creating it if needed), save BUNDLE as
    the next version of NAME and print the version number.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import joblib

import service.store.filesystem as filesystem
import service.store.objects as objects


def _hold(signal_file: str) -> None:
    Path(signal_file).write_text("holding")
    time.sleep(600)          # the parent kills us long before this ends
    sys.exit(3)


class _HoldingConnection:
    """Wraps a sqlite3 connection; stops just before COMMIT."""

    def __init__(self, db, signal_file: str) -> None:
        self._db = db
        self._signal_file = signal_file

    def execute(self, sql, *args):
        if sql == "COMMIT":
            _hold(self._signal_file)
        return self._db.execute(sql, *args)

    def __getattr__(self, name):
        return getattr(self._db, name)


def crash(store_dir: str, bundle_path: str, point: str, signal_file: str) -> None:
    bundle = joblib.load(bundle_path)
    store = filesystem.FilesystemStore(store_dir)
    if point == "object-fsync":
        # The serving artifact's temporary file is written and being fsynced (objects._write_atomic).
        def fsync(fd):
            _hold(signal_file)

        objects.os.fsync = fsync
    elif point in ("artifact-renamed", "report-renamed"):
        # os.replace calls in save_version: 1 temp -> the serving artifact's object, 2 temp -> the analysts'
        # object (both before the index transaction), 3 temp -> vN.json (inside it).
        real_replace = os.replace
        calls = [0]

        def replace(src, dst):
            calls[0] += 1
            real_replace(src, dst)
            if (point, calls[0]) in (("artifact-renamed", 2), ("report-renamed", 3)):
                _hold(signal_file)

        objects.os.replace = replace
    elif point == "commit":
        real_db = store._db
        store._db = lambda: _HoldingConnection(real_db(), signal_file)
    else:
        raise SystemExit(f"unknown point {point}")
    store.save_version("crash", bundle, make_live=None)
    sys.exit(4)              # not reached: the hold point is always hit


def _wait_for_go(ready_file: str, go_file: str) -> None:
    Path(ready_file).write_text("ready")
    deadline = time.monotonic() + 120
    while not Path(go_file).exists():
        if time.monotonic() > deadline:
            raise SystemExit("no go signal")
        time.sleep(0.001)


def save(store_dir: str, bundle_path: str, name: str, ready_file: str, go_file: str) -> None:
    bundle = joblib.load(bundle_path)
    _wait_for_go(ready_file, go_file)
    store = filesystem.FilesystemStore(store_dir)
    report = store.save_version(name, bundle, make_live=None)
    print(report["version"])


def promote(store_dir: str, name: str, version: str, ready_file: str, go_file: str) -> None:
    store = filesystem.FilesystemStore(store_dir)
    _wait_for_go(ready_file, go_file)
    print(store.set_live(name, int(version))["live_version"])


if __name__ == "__main__":
    command, *arguments = sys.argv[1:]
    {"crash": crash, "save": save, "promote": promote}[command](*arguments)
