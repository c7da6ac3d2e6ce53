"""Local store: content-addressed pickle-free serving artifacts, JSON reports, a SQLite index.

Layout under the store root::

    index.sqlite3                          segmentations, versions, labels, live pointer, drift reports
    objects/ab/<sha256>.npz                a serving artifact: arrays + JSON manifest, no pickle
                                           (``service.store.artifacts``), named by its SHA-256, which the
                                           version's index row holds (``service.store.objects``)
    objects/cd/<sha256>.joblib             the fitted scikit-learn objects, for analysts; the server never
                                           reads it (``FilesystemStore.fitted_path`` finds a version's)
    segmentations/<name>/v000003.json      the fit report (identity fields included)

The same layout as the postgres backend's shared artifact directory. A version becomes visible only when
its index row commits, and that happens last: the artifacts are written to temporary files, fsynced and
renamed to their content's name first, and the report inside the transaction. A crash before the commit
leaves at most files that no row names (an object, a report that the next fit of that number overwrites).
Version numbers come from a per-segmentation counter bumped inside the same ``BEGIN IMMEDIATE``
transaction, so concurrent fits (threads or processes) never share a number.

Stores written before content addressing keep their artifacts at ``segmentations/<name>/v000003.npz`` (and
``.joblib``); the index row names that file, and it is read from there (no conversion needed).

Stores written before the serving artifact existed list a ``.joblib`` file as a version's artifact. The
server does not unpickle it (a pickle is code): such a version answers an error that names it until
``segscore upgrade-store`` (``FilesystemStore.upgrade_legacy_versions``) converts it, once, on the operator's
say-so.
"""

from __future__ import annotations

import dataclasses
import fcntl
import hashlib
import io
import json
import os
import re
import shutil
import sqlite3
import threading
import time
import uuid
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator

import joblib

from service.core.bundle import Bundle
from service.core.serving import serving_version
from service.errors import (
    BundleCorrupt,
    Conflict,
    JobFinished,
    JobNotFound,
    JobNotRunning,
    KeyNameTaken,
    KeyNotFound,
    NoLiveVersion,
    SegmentationNotFound,
    SegmentNotFound,
    StoreUnavailable,
    VersionNotFound,
)
from service.store import artifacts
from service.store.base import ACTIVE_JOB_STATES, JOB_FIRST_STEP, MAX_UNFINISHED_PROGRESS, LoadedVersion, StoredKey
from service.store.objects import ContentAddressedFiles, _sha256_file, _write_atomic
from service.store.keys import SHOWN_PREFIX, key_digest, new_key, new_salt

SQLITE_MAX_INTEGER = 2**63 - 1
SERVING_SUFFIX = ".npz"
FITTED_SUFFIX = ".joblib"     # scikit-learn objects for analysts; also the artifact of a legacy version

SCHEMA = """
CREATE TABLE IF NOT EXISTS segmentations (
    name TEXT PRIMARY KEY,
    live_version INTEGER,
    last_version INTEGER NOT NULL DEFAULT 0,
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS versions (
    name TEXT NOT NULL REFERENCES segmentations(name),
    version INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    k INTEGER NOT NULL,
    n_records INTEGER NOT NULL,
    data_sha256 TEXT NOT NULL,
    bundle_sha256 TEXT NOT NULL,
    artifact TEXT NOT NULL,            -- <bundle_sha256>.npz (content-addressed); older rows: v000003.npz
    report TEXT NOT NULL,
    fitted_sha256 TEXT,                -- the analysts' .joblib object (NULL in rows older than objects)
    PRIMARY KEY (name, version)
);
CREATE TABLE IF NOT EXISTS labels (
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    segment INTEGER NOT NULL,
    label TEXT,
    PRIMARY KEY (name, version, segment)
);
CREATE TABLE IF NOT EXISTS drift_reports (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    id TEXT NOT NULL UNIQUE,
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    report TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS drift_by_name ON drift_reports (name, version, seq);
CREATE TABLE IF NOT EXISTS api_keys (
    name TEXT PRIMARY KEY,
    prefix TEXT NOT NULL,              -- the first characters of the key, to tell keys apart in a list
    salt BLOB NOT NULL,
    digest BLOB NOT NULL,              -- HMAC-SHA256(salt, key); the key itself is never stored
    scopes TEXT NOT NULL,              -- JSON list
    created_at TEXT NOT NULL,
    created_by TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS counters (
    name TEXT PRIMARY KEY,             -- 'keys': bumped by every key change, polled by running servers
    value INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS events (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    at TEXT NOT NULL,
    actor TEXT NOT NULL,               -- a key name, 'local' (auth off), 'cli' (the shell) or 'server'
    action TEXT NOT NULL,
    name TEXT,                         -- the segmentation (NULL for key events)
    version INTEGER,
    details TEXT NOT NULL              -- JSON object; never record values
);
CREATE INDEX IF NOT EXISTS events_by_name ON events (name, seq);
CREATE INDEX IF NOT EXISTS drift_by_time ON drift_reports (created_at);
CREATE TABLE IF NOT EXISTS jobs (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,  -- orders the list (newest first)
    id TEXT NOT NULL UNIQUE,
    segmentation TEXT NOT NULL,
    state TEXT NOT NULL,               -- queued, running, done, failed, cancelled
    step TEXT NOT NULL,
    progress REAL NOT NULL,
    version INTEGER,
    error TEXT,                        -- JSON: the 'detail' a synchronous fit would have answered
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL,
    owner TEXT NOT NULL,               -- the server process running it (it refreshes heartbeat_at)
    heartbeat_at TEXT NOT NULL,
    actor TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS jobs_by_segmentation ON jobs (segmentation, seq);
CREATE INDEX IF NOT EXISTS jobs_active ON jobs (state, heartbeat_at);
CREATE TABLE IF NOT EXISTS live_counts (
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    bucket_start INTEGER NOT NULL,     -- unix seconds, a multiple of bucket_seconds
    bucket_seconds INTEGER NOT NULL,
    slot INTEGER NOT NULL,             -- a counter of the version's layout (service/live/counts.py)
    count INTEGER NOT NULL,            -- records; never a record value
    PRIMARY KEY (name, version, bucket_start, bucket_seconds, slot)
);
CREATE INDEX IF NOT EXISTS live_counts_by_time ON live_counts (bucket_start);
"""

# Adds a replica's counts to the stored ones (both backends): buckets merge by addition.
LIVE_COUNTS_UPSERT = ("INSERT INTO live_counts (name, version, bucket_start, bucket_seconds, slot, count)"
                      " VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (name, version, bucket_start, bucket_seconds, slot)"
                      " DO UPDATE SET count = live_counts.count + excluded.count")

# The actor of writes made from the shell (``segscore store-fit``, ``segscore keys ...``).
CLI_ACTOR = "cli"
# How many events ``get_segmentation`` returns (newest first).
MAX_LISTED_EVENTS = 200


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


_LONE_SURROGATE = re.compile("[\ud800-\udfff]")
_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F]")


def _repair_text(value: Any) -> Any:
    """Replace lone UTF-16 surrogates by U+FFFD in every string of a decoded report (keys too).

    Input is refused at the door now, but versions stored before that check may hold such a column name;
    they cannot be encoded as UTF-8 in an answer, so they are repaired on read (the stored text is unchanged).
    """
    if isinstance(value, str):
        return _LONE_SURROGATE.sub("\ufffd", value)
    if isinstance(value, dict):
        return {_repair_text(k): _repair_text(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_repair_text(v) for v in value]
    return value


class FilesystemStore:
    """The default store. Safe for threads of one process and for several processes on one disk."""

    # The fit engine that made a version, read from its stored report (SQL of the index's dialect).
    _REPORT_ENGINE = "json_extract(report, '$.engine')"

    def __init__(self, root: Path | str) -> None:
        self.root = Path(root)
        self.files = ContentAddressedFiles(self.root)
        self._local = threading.local()
        try:
            (self.root / "segmentations").mkdir(parents=True, exist_ok=True)
            # Switching to WAL needs an exclusive lock that SQLite's busy timeout does not wait for, so
            # processes opening a new store at once take turns on a lock file. WAL then persists in the file.
            with open(self.root / ".init.lock", "a") as lock:
                fcntl.flock(lock, fcntl.LOCK_EX)
                self._db().execute("PRAGMA journal_mode=WAL")
                self._db().executescript(SCHEMA)  # idempotent; executescript manages its own transaction
                columns = {row["name"] for row in self._db().execute("PRAGMA table_info(versions)")}
                if "fitted_sha256" not in columns:        # a store made before content addressing
                    self._db().execute("ALTER TABLE versions ADD COLUMN fitted_sha256 TEXT")
            self._remove_crash_leftovers()
        except (OSError, sqlite3.Error) as exc:
            raise StoreUnavailable(f"cannot open the store at {self.root}: {exc}") from None

    def _remove_crash_leftovers(self, min_age_seconds: float = 3600.0) -> None:
        """Delete temporary and staged files a killed writer left behind. Only old ones: a file younger than
        ``min_age_seconds`` may belong to a fit that another process is writing right now."""
        cutoff = time.time() - min_age_seconds
        leftovers = [*self.files.temporary_files()]
        for pattern in (".tmp-*", ".staged-*"):
            leftovers += (self.root / "segmentations").glob(f"*/{pattern}")
        for path in leftovers:
            try:
                if path.stat().st_mtime < cutoff:
                    path.unlink()
            except FileNotFoundError:
                pass

    # ----------------------------------------------------------------- connections
    def _db(self) -> sqlite3.Connection:
        db = getattr(self._local, "db", None)
        if db is None:
            db = sqlite3.connect(self.root / "index.sqlite3", timeout=60, isolation_level=None)
            db.execute("PRAGMA synchronous=FULL")
            db.row_factory = sqlite3.Row
            self._local.db = db
        return db

    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        db = self._db()
        db.execute("BEGIN IMMEDIATE")
        try:
            yield db
            db.execute("COMMIT")
        except BaseException:
            # Also after a failed COMMIT: left open, the transaction would make every later BEGIN on this
            # thread's connection fail.
            if db.in_transaction:
                db.execute("ROLLBACK")
            raise

    @contextmanager
    def _writing(self, what: str) -> Iterator[sqlite3.Connection]:
        """A write transaction whose index errors surface as StoreUnavailable (503), not as a bare 500."""
        try:
            with self._transaction() as db:
                yield db
        except sqlite3.Error as exc:
            raise StoreUnavailable(f"{what} could not be written to the store index: {exc}") from None

    def _query(self, sql: str, params: tuple = ()) -> list[sqlite3.Row]:
        try:
            return self._db().execute(sql, params).fetchall()
        except sqlite3.Error as exc:
            raise StoreUnavailable(f"the store index cannot be read: {exc}") from None

    def check(self) -> None:
        self._query("SELECT 1")
        if not os.access(self.root, os.W_OK):
            raise StoreUnavailable(f"the store directory {self.root} is not writable")

    # ----------------------------------------------------------------- writes
    def _put_artifacts(self, name: str, bundle: Bundle) -> tuple[str, str]:
        """Write the serving artifact and the analysts' file as content-addressed objects (both backends);
        return their SHA-256s. A write the file system refuses (read-only, full, no permission) is
        StoreUnavailable. Objects that no index row names yet are harmless: nothing lists them."""
        fitted = io.BytesIO()
        try:
            joblib.dump(bundle, fitted, compress=3)
            bundle_sha = self.files.put(artifacts.dumps(serving_version(bundle)), SERVING_SUFFIX)
            fitted_sha = self.files.put(fitted.getvalue(), FITTED_SUFFIX)
        except OSError as exc:
            raise StoreUnavailable(f"a version of '{name}' could not be written to the store: "
                                   f"{exc.strerror or type(exc).__name__}") from None
        return bundle_sha, fitted_sha

    def save_version(self, name: str, bundle: Bundle, *, make_live: bool | None,
                     actor: str = CLI_ACTOR, job_id: str | None = None) -> dict[str, Any]:
        """Persist ``bundle`` as the next version of ``name``; return its report.

        With ``job_id`` (a background fit), the version is written only if that job is still running, and the
        job is marked done with it in the same transaction (JobNotRunning otherwise: nothing is written).
        A write the file system refuses (read-only, full, no permission) is StoreUnavailable."""
        # The heavy writes happen outside the index lock; only the small report inside it.
        bundle_sha, fitted_sha = self._put_artifacts(name, bundle)
        folder = self.root / "segmentations" / name
        try:
            folder.mkdir(parents=True, exist_ok=True)
            with self._writing(f"a version of '{name}'") as db:
                self._claim_job_for_version(db, job_id)
                now = utc_now()
                row = db.execute("SELECT last_version, live_version FROM segmentations WHERE name=?",
                                 (name,)).fetchone()
                if row is None:
                    db.execute("INSERT INTO segmentations (name, live_version, last_version, created_at, updated_at)"
                               " VALUES (?, NULL, 0, ?, ?)", (name, now, now))
                    last, live = 0, None
                else:
                    last, live = row["last_version"], row["live_version"]
                version = self._index_new_version(db, name, bundle, last=last, live=live, make_live=make_live,
                                                  actor=actor, job_id=job_id, bundle_sha=bundle_sha,
                                                  fitted_sha=fitted_sha, now=now)
        except JobNotRunning:
            self._remove_unreferenced({bundle_sha, fitted_sha})     # the job's files go with its version
            raise
        except OSError as exc:
            raise StoreUnavailable(f"a version of '{name}' could not be written to the store: "
                                   f"{exc.strerror or type(exc).__name__}") from None
        return self.version_report(name, version)

    def set_live(self, name: str, version: int, *, actor: str = CLI_ACTOR) -> dict[str, Any]:
        with self._writing(f"the live version of '{name}'") as db:
            self._require_version(db, name, version)
            previous = db.execute("SELECT live_version FROM segmentations WHERE name=?", (name,)).fetchone()[0]
            db.execute("UPDATE segmentations SET live_version=?, updated_at=? WHERE name=?",
                       (version, utc_now(), name))
            change = ("promote" if previous is None or version > previous
                      else "roll_back" if version < previous else "unchanged")
            self._record_event(db, actor, "set_live", name, version, {"previous": previous, "change": change})
        return self.get_segmentation(name)

    def set_label(self, name: str, version: int, segment: int, label: str | None, *,
                  actor: str = CLI_ACTOR) -> dict[str, Any]:
        with self._writing(f"a segment label of '{name}'") as db:
            row = self._require_version(db, name, version)
            if not 0 <= segment < row["k"]:
                raise SegmentNotFound(name, version, segment, row["k"])
            db.execute("INSERT INTO labels (name, version, segment, label) VALUES (?, ?, ?, ?)"
                       " ON CONFLICT (name, version, segment) DO UPDATE SET label=excluded.label",
                       (name, version, segment, label))
            db.execute("UPDATE segmentations SET updated_at=? WHERE name=?", (utc_now(), name))
            self._record_event(db, actor, "label", name, version, {"segment": segment, "label": label})
        report = self.version_report(name, version)
        return report["segments"][segment]

    def save_drift_report(self, report: dict[str, Any]) -> None:
        """Append a drift report; its ``seq`` (autoincrement, under the write lock) orders the list."""
        text = json.dumps(report, allow_nan=False)  # the contract has no NaN/Infinity; fail before writing
        with self._writing(f"a drift report of '{report['name']}'") as db:
            db.execute("INSERT INTO drift_reports (id, name, version, created_at, report) VALUES (?, ?, ?, ?, ?)",
                       (report["id"], report["name"], report["version"], report["created_at"], text))

    # ----------------------------------------------------------------- reads
    def _require_version(self, db: sqlite3.Connection, name: str, version: int) -> sqlite3.Row:
        # SQLite cannot even bind an int past 2**63 - 1 (OverflowError); no version has such a number anyway.
        number = version if 0 < version <= SQLITE_MAX_INTEGER else 0
        row = db.execute("SELECT * FROM versions WHERE name=? AND version=?", (name, number)).fetchone()
        if row is None:
            if db.execute("SELECT 1 FROM segmentations WHERE name=?", (name,)).fetchone() is None:
                raise SegmentationNotFound(name)
            raise VersionNotFound(name, version)
        return row

    @staticmethod
    def _segmentation_row(row: sqlite3.Row) -> dict[str, Any]:
        return {"name": row["name"], "live_version": row["live_version"], "latest_version": row["last_version"],
                "created_at": row["created_at"][:19] + "Z", "updated_at": row["updated_at"][:19] + "Z"}

    def list_segmentations(self) -> list[dict[str, Any]]:
        rows = self._query("SELECT * FROM segmentations WHERE last_version > 0 ORDER BY name")
        return [self._segmentation_row(r) for r in rows]

    def get_segmentation(self, name: str) -> dict[str, Any]:
        rows = self._query("SELECT * FROM segmentations WHERE name=?", (name,))
        if not rows:
            raise SegmentationNotFound(name)
        result = self._segmentation_row(rows[0])
        live = rows[0]["live_version"]
        authors = self._version_authors(name)
        result["versions"] = [
            {"version": v["version"], "created_at": v["created_at"], "live": v["version"] == live, "k": v["k"],
             "n_records": v["n_records"], "data_sha256": v["data_sha256"],
             "created_by": authors.get(v["version"]), "engine": v["engine"]}
            for v in self._query("SELECT version, created_at, k, n_records, data_sha256, "
                                 f"{self._REPORT_ENGINE} AS engine FROM versions WHERE name=? ORDER BY version",
                                 (name,))
        ]
        result["events"] = self.events(name, limit=MAX_LISTED_EVENTS)
        return result

    def version_report(self, name: str, version: int) -> dict[str, Any]:
        row = self._require_version(self._db(), name, version)
        live = self._query("SELECT live_version FROM segmentations WHERE name=?", (name,))[0]["live_version"]
        report = json.loads(row["report"])
        if _SURROGATE_ESCAPE.search(row["report"]):      # stored as ASCII: any surrogate shows as its escape
            report = _repair_text(report)
        report["live"] = live == version
        labels = self.labels(name, version)
        for segment in report["segments"]:
            segment["label"] = labels.get(segment["id"])
        return report

    def labels(self, name: str, version: int) -> dict[int, str]:
        rows = self._query("SELECT segment, label FROM labels WHERE name=? AND version=?", (name, version))
        return {r["segment"]: r["label"] for r in rows if r["label"] is not None}

    def resolve_version(self, name: str, version: int | None) -> int:
        if version is not None:
            self._require_version(self._db(), name, version)
            return version
        rows = self._query("SELECT live_version FROM segmentations WHERE name=?", (name,))
        if not rows:
            raise SegmentationNotFound(name)
        if rows[0]["live_version"] is None:
            raise NoLiveVersion(name)
        return int(rows[0]["live_version"])

    def _artifact_path_of(self, name: str, row: Any) -> Path:
        if row["artifact"] == f"{row['bundle_sha256']}{SERVING_SUFFIX}":     # content-addressed
            return self.files.path(row["bundle_sha256"], SERVING_SUFFIX)
        return self.root / "segmentations" / name / row["artifact"]          # a store older than objects

    def artifact_path(self, name: str, version: int) -> Path:
        """Where a version's serving artifact is (an object; in stores older than objects, the version's file)."""
        return self._artifact_path_of(name, self._require_version(self._db(), name, version))

    def fitted_path(self, name: str, version: int) -> Path:
        """Where a version's fitted scikit-learn objects are (``joblib.load`` it; for analysts, trusted)."""
        row = self._require_version(self._db(), name, version)
        if row["fitted_sha256"]:
            return self.files.path(row["fitted_sha256"], FITTED_SUFFIX)
        return self.root / "segmentations" / name / f"v{version:06d}{FITTED_SUFFIX}"

    def load(self, name: str, version: int) -> LoadedVersion:
        """The verified serving artifact of a version, read now (``ServingCache`` keeps what is served). Never
        unpickles anything."""
        row = self._require_version(self._db(), name, version)
        if not row["artifact"].endswith(SERVING_SUFFIX):
            raise BundleCorrupt(name, version, "is in the legacy pickle format, which the server does not load; "
                                "run 'segscore upgrade-store' once to convert it")
        try:
            data = self._artifact_path_of(name, row).read_bytes()
        except OSError:
            raise BundleCorrupt(name, version, "is missing or unreadable") from None
        # Hash the very bytes that get parsed: no window in which the file could change in between.
        if hashlib.sha256(data).hexdigest() != row["bundle_sha256"]:
            raise BundleCorrupt(name, version)
        try:
            serving = artifacts.loads(data)
        except artifacts.ArtifactError:
            raise BundleCorrupt(name, version, "cannot be read as a serving artifact") from None
        return LoadedVersion(name, version, serving.bundle, serving.compiled)

    def legacy_versions(self) -> list[tuple[str, int]]:
        """Versions whose artifact is still a legacy pickle (written before serving artifacts existed)."""
        rows = self._query(f"SELECT name, version FROM versions WHERE artifact NOT LIKE '%{SERVING_SUFFIX}'"
                           " ORDER BY name, version")
        return [(r["name"], r["version"]) for r in rows]

    def upgrade_legacy_versions(self) -> tuple[list[tuple[str, int]], list[tuple[str, int, str]]]:
        """Convert every legacy (pickle) version into a serving artifact; return the converted versions and
        those that cannot be converted, with the reason (they stay legacy: an error naming them, as before).

        A version fitted by a release older than the per-segment held-out calibration lacks fields that the
        serving artifact needs (held-out thresholds and drift baselines); they cannot be made up after the fact
        without the training data, so such a version must be refitted.

        The one place in the code base that unpickles a stored file, and only a file that still matches the
        SHA-256 recorded when it was written. Run by an operator (``segscore upgrade-store``) on a store they
        trust, never by the server. The old file stays beside the new one as the analysts' copy of the fitted
        scikit-learn objects.
        """
        converted: list[tuple[str, int]] = []
        refused: list[tuple[str, int, str]] = []
        for name, version in self.legacy_versions():
            row = self._require_version(self._db(), name, version)
            folder = self.root / "segmentations" / name
            legacy = folder / row["artifact"]
            try:
                if _sha256_file(legacy) != row["bundle_sha256"]:
                    raise BundleCorrupt(name, version)
            except FileNotFoundError:
                raise BundleCorrupt(name, version, "is missing") from None
            bundle = _legacy_read_pickled_bundle(legacy)
            missing = _missing_fields(bundle)
            if missing:
                refused.append((name, version, f"fitted by an earlier release: it lacks {', '.join(missing[:5])}; "
                                               "refit it from its training data"))
                continue
            sha = self.files.put(artifacts.dumps(serving_version(bundle)), SERVING_SUFFIX)
            report = json.loads(row["report"])
            report["bundle_sha256"] = sha
            text = json.dumps(report, allow_nan=False)
            self._keep_report_file(name, version, text)
            with self._writing(f"the upgraded artifact of '{name}' version {version}") as db:
                db.execute("UPDATE versions SET artifact=?, bundle_sha256=?, report=? WHERE name=? AND version=?",
                           (f"{sha}{SERVING_SUFFIX}", sha, text, name, version))
            converted.append((name, version))
        return converted, refused

    def list_drift_reports(self, name: str, *, version: int | None, limit: int) -> list[dict[str, Any]]:
        if not self._query("SELECT 1 FROM segmentations WHERE name=?", (name,)):
            raise SegmentationNotFound(name)
        if version is None:
            rows = self._query("SELECT report FROM drift_reports WHERE name=? ORDER BY seq DESC LIMIT ?",
                               (name, limit))
        else:
            rows = self._query("SELECT report FROM drift_reports WHERE name=? AND version=? ORDER BY seq DESC"
                               " LIMIT ?", (name, version, limit))
        return [json.loads(r["report"]) for r in rows]

    # ----------------------------------------------------------------- background fit jobs
    # Postgres appends " FOR UPDATE" (a row lock until commit); SQLite's BEGIN IMMEDIATE already serializes
    # every writer of the index.
    _ROW_LOCK = ""

    @staticmethod
    def _job_row(row: sqlite3.Row) -> dict[str, Any]:
        return {"id": row["id"], "segmentation": row["segmentation"], "state": row["state"], "step": row["step"],
                "progress": float(row["progress"]), "version": row["version"],
                "error": None if row["error"] is None else json.loads(row["error"]),
                "created_at": row["created_at"][:19] + "Z", "updated_at": row["updated_at"][:19] + "Z"}

    def create_job(self, name: str, *, owner: str, actor: str = CLI_ACTOR) -> dict[str, Any]:
        job_id = uuid.uuid4().hex
        with self._writing(f"a job of '{name}'") as db:
            now = utc_now()
            db.execute("INSERT INTO jobs (id, segmentation, state, step, progress, version, error, created_at,"
                       " updated_at, owner, heartbeat_at, actor) VALUES (?, ?, 'queued', ?, 0.0, NULL, NULL, ?, ?,"
                       " ?, ?, ?)", (job_id, name, JOB_FIRST_STEP, now, now, owner, now, actor))
        return self.job(job_id)

    def job(self, job_id: str) -> dict[str, Any]:
        rows = self._query("SELECT * FROM jobs WHERE id=?", (job_id,))
        if not rows:
            raise JobNotFound(job_id)
        return self._job_row(rows[0])

    def jobs(self, name: str | None, *, limit: int) -> list[dict[str, Any]]:
        if name is None:
            rows = self._query("SELECT * FROM jobs ORDER BY seq DESC LIMIT ?", (limit,))
        else:
            rows = self._query("SELECT * FROM jobs WHERE segmentation=? ORDER BY seq DESC LIMIT ?", (name, limit))
        return [self._job_row(r) for r in rows]

    def _locked_job(self, db: sqlite3.Connection, job_id: str) -> sqlite3.Row | None:
        return db.execute(f"SELECT * FROM jobs WHERE id=?{self._ROW_LOCK}", (job_id,)).fetchone()

    def job_progress(self, job_id: str, step: str, progress: float) -> str | None:
        """Record that a queued or running job is running ``step``; its progress never goes back, and stays below
        1 (1 is "done"). Returns the job's state after the call (a cancelled job stays cancelled), None if gone."""
        with self._writing(f"the progress of job {job_id!r}") as db:
            row = self._locked_job(db, job_id)
            if row is None:
                return None
            if row["state"] not in ACTIVE_JOB_STATES:
                return row["state"]
            db.execute("UPDATE jobs SET state='running', step=?, progress=?, updated_at=? WHERE id=?",
                       (step, max(float(row["progress"]), min(float(progress), MAX_UNFINISHED_PROGRESS)),
                        utc_now(), job_id))
        return "running"

    def fail_job(self, job_id: str, error: Any) -> None:
        """Mark a queued or running job failed with ``error`` (the ``detail`` of the refusal); a finished or
        cancelled job is left as it is."""
        with self._writing(f"the state of job {job_id!r}") as db:
            db.execute("UPDATE jobs SET state='failed', error=?, updated_at=? WHERE id=? AND state IN"
                       " ('queued', 'running')", (json.dumps(error, allow_nan=False), utc_now(), job_id))

    def cancel_job(self, job_id: str, *, actor: str = CLI_ACTOR) -> dict[str, Any]:
        """Cancel a queued or running job (JobFinished, a 409, for any other). Its version can no longer be
        written: ``save_version`` checks the job's state in its own transaction."""
        with self._writing(f"the state of job {job_id!r}") as db:
            row = self._locked_job(db, job_id)
            if row is None:
                raise JobNotFound(job_id)
            if row["state"] not in ACTIVE_JOB_STATES:
                raise JobFinished(job_id, row["state"])
            db.execute("UPDATE jobs SET state='cancelled', updated_at=? WHERE id=?", (utc_now(), job_id))
            self._record_event(db, actor, "cancel_job", row["segmentation"], None, {"job": job_id})
        return self.job(job_id)

    def heartbeat_jobs(self, owner: str) -> None:
        """The jobs of ``owner`` that are queued or running are still being looked after."""
        with self._writing("the heartbeat of running jobs") as db:
            db.execute("UPDATE jobs SET heartbeat_at=? WHERE owner=? AND state IN ('queued', 'running')",
                       (utc_now(), owner))

    def fail_abandoned_jobs(self, *, alive_owner: str, heartbeat_before: str, error: Any) -> int:
        """Mark failed the queued or running jobs of other server processes that stopped refreshing them
        (their process stopped: a restart, a crash). Returns how many."""
        with self._writing("the state of abandoned jobs") as db:
            result = db.execute("UPDATE jobs SET state='failed', error=?, updated_at=? WHERE state IN"
                                " ('queued', 'running') AND owner<>? AND heartbeat_at<?",
                                (json.dumps(error), utc_now(), alive_owner, heartbeat_before))
            return max(result.rowcount, 0)

    def fail_owned_jobs(self, owner: str, error: Any) -> int:
        """Mark failed every queued or running job of ``owner`` (a server shutting down). Returns how many."""
        with self._writing("the state of stopped jobs") as db:
            result = db.execute("UPDATE jobs SET state='failed', error=?, updated_at=? WHERE state IN"
                                " ('queued', 'running') AND owner=?", (json.dumps(error), utc_now(), owner))
            return max(result.rowcount, 0)

    def _index_new_version(self, db: Any, name: str, bundle: Bundle, *, last: int, live: int | None,
                           make_live: bool | None, actor: str, job_id: str | None, bundle_sha: str,
                           fitted_sha: str, now: str) -> int:
        """Write the index rows of the version after ``last`` and return its number (both backends; the caller
        holds the segmentation's write lock and has claimed the job)."""
        version = last + 1
        go_live = (live is None and version == 1) if make_live is None else bool(make_live)
        report = {"name": name, "version": version, "created_at": now[:19] + "Z",
                  **bundle.report, "bundle_sha256": bundle_sha}
        text = json.dumps(report, allow_nan=False)  # no NaN/Infinity may reach a stored report
        self._keep_report_file(name, version, text)
        db.execute(
            "INSERT INTO versions (name, version, created_at, k, n_records, data_sha256, bundle_sha256,"
            " fitted_sha256, artifact, report) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (name, version, report["created_at"], bundle.k, bundle.report["n_records"],
             bundle.report["data_sha256"], bundle_sha, fitted_sha, f"{bundle_sha}{SERVING_SUFFIX}", text))
        db.execute("UPDATE segmentations SET last_version=?, updated_at=?,"
                   " live_version=CASE WHEN ? THEN ? ELSE live_version END WHERE name=?",
                   (version, now, go_live, version, name))
        self._record_event(db, actor, "fit", name, version, {"live": go_live}, at=now)
        self._complete_job(db, job_id, version, now)
        return version

    def _keep_report_file(self, name: str, version: int, text: str) -> None:
        # A readable copy of the report beside the version's files: it goes with them when they are erased.
        folder = self.root / "segmentations" / name
        _write_atomic(folder / f"v{version:06d}.json", lambda handle: handle.write(text.encode()))

    def _claim_job_for_version(self, db: sqlite3.Connection, job_id: str | None) -> None:
        """Inside the transaction that writes a job's version: refuse unless the job still runs, so a cancel
        that committed first (even during 'saving') leaves no version. The row stays locked until commit."""
        if job_id is None:
            return
        row = self._locked_job(db, job_id)
        if row is None or row["state"] != "running":
            raise JobNotRunning(job_id, None if row is None else row["state"])

    @staticmethod
    def _complete_job(db: sqlite3.Connection, job_id: str | None, version: int, now: str) -> None:
        if job_id is not None:
            db.execute("UPDATE jobs SET state='done', progress=1.0, version=?, updated_at=? WHERE id=?",
                       (version, now, job_id))

    # ----------------------------------------------------------------- events (who did what)
    @staticmethod
    def _record_event(db: sqlite3.Connection, actor: str, action: str, name: str | None, version: int | None,
                      details: dict[str, Any], *, at: str | None = None) -> None:
        """Append an event inside the caller's write transaction, so the write and its record commit together.

        A segmentation's event also bumps the ``changes`` counter (what is served may have changed), which
        running servers poll to stay in step (service/store/cache.py)."""
        if name is not None:
            db.execute("INSERT INTO counters (name, value) VALUES ('changes', 1)"
                       " ON CONFLICT (name) DO UPDATE SET value = counters.value + 1")
        db.execute("INSERT INTO events (at, actor, action, name, version, details) VALUES (?, ?, ?, ?, ?, ?)",
                   (at or utc_now(), actor, action, name, version, json.dumps(details, allow_nan=False)))

    def _since_last_deletion(self, name: str) -> int:
        """The seq of the last deletion of segmentation ``name`` (0 if never): a later segmentation of the same
        name starts its history there."""
        rows = self._query("SELECT MAX(seq) AS seq FROM events WHERE name=? AND action='delete_segmentation'",
                           (name,))
        return rows[0]["seq"] or 0

    def events(self, name: str | None, *, limit: int) -> list[dict[str, Any]]:
        """Events of segmentation ``name`` (its deletion and everything since), or key events for None;
        newest first."""
        if name is None:
            rows = self._query("SELECT * FROM events WHERE name IS NULL ORDER BY seq DESC LIMIT ?", (limit,))
        else:
            rows = self._query("SELECT * FROM events WHERE name=? AND seq>=? ORDER BY seq DESC LIMIT ?",
                               (name, self._since_last_deletion(name), limit))
        return [{"at": r["at"][:19] + "Z", "actor": r["actor"], "action": r["action"], "version": r["version"],
                 "details": json.loads(r["details"])} for r in rows]

    def _version_authors(self, name: str) -> dict[int, str]:
        rows = self._query("SELECT version, actor FROM events WHERE name=? AND action='fit' AND seq>? ORDER BY seq",
                           (name, self._since_last_deletion(name)))
        return {r["version"]: r["actor"] for r in rows}

    # ----------------------------------------------------------------- deletion (personal data)
    def _version_files(self, name: str, version: int) -> list[Path]:
        """The files of one version under its segmentation's folder (its report; in stores older than objects,
        its artifacts too): all are named v<number>.*."""
        return sorted((self.root / "segmentations" / name).glob(f"v{version:06d}.*"))

    def _artifact_shas(self, name: str, version: int | None) -> set[str]:
        rows = self._query("SELECT bundle_sha256, fitted_sha256 FROM versions WHERE name=?"
                           + ("" if version is None else " AND version=?"),
                           (name,) if version is None else (name, version))
        return {sha for row in rows for sha in (row[0], row[1]) if sha}

    def _remove_unreferenced(self, shas: set[str]) -> None:
        """Delete the objects of ``shas`` that no version refers to any more (personal data goes with them):
        the same bytes fitted twice are one object, kept while a version names it."""
        for sha in shas:
            if not self._query("SELECT 1 FROM versions WHERE bundle_sha256=? OR fitted_sha256=? LIMIT 1",
                               (sha, sha)):
                self.files.remove(sha, SERVING_SUFFIX)
                self.files.remove(sha, FITTED_SUFFIX)

    def delete_version(self, name: str, version: int, *, actor: str = CLI_ACTOR) -> None:
        """Erase one version: its index row, labels, drift reports and files. The live version is refused (409).

        The index rows go first (one transaction), then the files; a crash in between leaves unlisted files
        that no request can reach and that a second deletion of the segmentation removes."""
        shas = self._artifact_shas(name, version)
        with self._writing(f"the deletion of '{name}' version {version}") as db:
            self._require_version(db, name, version)
            live = db.execute("SELECT live_version FROM segmentations WHERE name=?", (name,)).fetchone()[0]
            if live == version:
                raise Conflict(f"version {version} of '{name}' is live; make another version live before "
                               "deleting it (or delete the whole segmentation)")
            reports = db.execute("DELETE FROM drift_reports WHERE name=? AND version=?", (name, version)).rowcount
            db.execute("DELETE FROM labels WHERE name=? AND version=?", (name, version))
            db.execute("DELETE FROM live_counts WHERE name=? AND version=?", (name, version))
            db.execute("DELETE FROM versions WHERE name=? AND version=?", (name, version))
            db.execute("UPDATE segmentations SET updated_at=? WHERE name=?", (utc_now(), name))
            self._record_event(db, actor, "delete_version", name, version, {"drift_reports": reports})
        for path in self._version_files(name, version):
            path.unlink(missing_ok=True)
        self._remove_unreferenced(shas)

    def delete_segmentation(self, name: str, *, actor: str = CLI_ACTOR) -> None:
        """Erase a segmentation: every version, artifact, report, label and drift report. The event stays."""
        shas = self._artifact_shas(name, None)
        with self._writing(f"the deletion of '{name}'") as db:
            if db.execute("SELECT 1 FROM segmentations WHERE name=?", (name,)).fetchone() is None:
                raise SegmentationNotFound(name)
            versions = [r[0] for r in db.execute("SELECT version FROM versions WHERE name=? ORDER BY version",
                                                 (name,))]
            reports = db.execute("DELETE FROM drift_reports WHERE name=?", (name,)).rowcount
            db.execute("DELETE FROM labels WHERE name=?", (name,))
            db.execute("DELETE FROM live_counts WHERE name=?", (name,))
            db.execute("DELETE FROM versions WHERE name=?", (name,))
            db.execute("DELETE FROM segmentations WHERE name=?", (name,))
            self._record_event(db, actor, "delete_segmentation", name, None,
                               {"versions": versions, "drift_reports": reports})
        shutil.rmtree(self.root / "segmentations" / name, ignore_errors=True)
        self._remove_unreferenced(shas)

    def prune_drift_reports(self, older_than: str, *, actor: str = "server") -> int:
        """Delete drift reports created before ``older_than`` (ISO UTC); return how many went."""
        with self._writing("the drift-report retention") as db:
            gone = db.execute("DELETE FROM drift_reports WHERE created_at < ?", (older_than,)).rowcount
            if gone:
                self._record_event(db, actor, "prune_drift_reports", None, None,
                                   {"deleted": gone, "older_than": older_than})
        return gone

    # ----------------------------------------------------------------- live drift counts
    def add_live_counts(self, rows: list[tuple[str, int, int, int, int, int]]) -> None:
        """Add ``(name, version, bucket_start, bucket_seconds, slot, count)`` rows to the stored counts, in one
        transaction (all or none). No event: this runs every few seconds per replica."""
        with self._writing("live drift counts") as db:
            db.executemany(LIVE_COUNTS_UPSERT, rows)

    def live_counts(self, name: str, version: int, *, since: int) -> dict[int, int]:
        """Slot -> count summed over the buckets of ``name`` ``version`` that start at or after ``since``."""
        rows = self._query("SELECT slot, SUM(count) AS total FROM live_counts WHERE name=? AND version=?"
                           " AND bucket_start>=? GROUP BY slot", (name, version, since))
        return {int(r["slot"]): int(r["total"]) for r in rows}

    def prune_live_counts(self, older_than: int, *, actor: str = "server") -> int:
        """Delete the live-count buckets that start before ``older_than`` (unix seconds); return rows deleted."""
        with self._writing("the live-count retention") as db:
            gone = db.execute("DELETE FROM live_counts WHERE bucket_start < ?", (older_than,)).rowcount
            if gone:
                self._record_event(db, actor, "prune_live_counts", None, None,
                                   {"deleted_rows": gone, "older_than": older_than})
        return gone

    # ----------------------------------------------------------------- API keys
    def _bump_keys_counter(self, db: sqlite3.Connection) -> None:
        db.execute("INSERT INTO counters (name, value) VALUES ('keys', 1)"
                   " ON CONFLICT (name) DO UPDATE SET value = counters.value + 1")

    def create_key(self, name: str, scopes: list[str], *, actor: str = CLI_ACTOR) -> str:
        """Create a key; return it (the only time it exists in clear). A taken name raises KeyNameTaken."""
        key, salt = new_key(), new_salt()
        with self._writing(f"the API key '{name}'") as db:
            if db.execute("SELECT 1 FROM api_keys WHERE name=?", (name,)).fetchone() is not None:
                raise KeyNameTaken(name)
            db.execute("INSERT INTO api_keys (name, prefix, salt, digest, scopes, created_at, created_by)"
                       " VALUES (?, ?, ?, ?, ?, ?, ?)",
                       (name, key[:SHOWN_PREFIX], salt, key_digest(salt, key), json.dumps(sorted(scopes)),
                        utc_now(), actor))
            self._bump_keys_counter(db)
            self._record_event(db, actor, "create_key", None, None, {"key": name, "scopes": sorted(scopes)})
        return key

    def revoke_key(self, name: str, *, actor: str = CLI_ACTOR) -> None:
        with self._writing(f"the revocation of API key '{name}'") as db:
            if db.execute("DELETE FROM api_keys WHERE name=?", (name,)).rowcount == 0:
                raise KeyNotFound(name)
            self._bump_keys_counter(db)
            self._record_event(db, actor, "revoke_key", None, None, {"key": name})

    def stored_keys(self) -> list[StoredKey]:
        rows = self._query("SELECT * FROM api_keys ORDER BY name")
        return [StoredKey(name=r["name"], prefix=r["prefix"], salt=r["salt"], digest=r["digest"],
                          scopes=tuple(json.loads(r["scopes"])), created_at=r["created_at"][:19] + "Z")
                for r in rows]

    def counters(self) -> dict[str, int]:
        return {r["name"]: r["value"] for r in self._query("SELECT name, value FROM counters")}

    def live_versions(self) -> dict[str, int]:
        rows = self._query("SELECT name, live_version FROM segmentations WHERE live_version IS NOT NULL")
        return {r["name"]: r["live_version"] for r in rows}

    def version_keys(self) -> set[tuple[str, int]]:
        return {(r["name"], r["version"]) for r in self._query("SELECT name, version FROM versions")}

    def keys_counter(self) -> int:
        """A number that changes whenever a key is created or revoked (cheap to poll)."""
        rows = self._query("SELECT value FROM counters WHERE name='keys'")
        return rows[0]["value"] if rows else 0


def _missing_fields(value: Any, prefix: str = "") -> list[str]:
    """Dataclass fields (nested ones too) that an unpickled object lacks: it was written by an older release."""
    if not dataclasses.is_dataclass(value):
        return []
    missing = []
    for field in dataclasses.fields(value):
        if field.name not in vars(value):
            missing.append(prefix + field.name)
        else:
            missing.extend(_missing_fields(vars(value)[field.name], f"{prefix}{field.name}."))
    return missing


def _legacy_read_pickled_bundle(path: Path) -> Bundle:
    """Unpickle a legacy version's joblib artifact. Only ``upgrade_legacy_versions`` calls this."""
    return joblib.load(path)
