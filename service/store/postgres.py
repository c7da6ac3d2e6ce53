"""The postgres backend: the index in PostgreSQL (psycopg 3, a connection pool), the artifacts in a directory
that every replica shares, content-addressed by SHA-256 (service/store/objects.py).

It runs the local store's index logic (``FilesystemStore``: the same tables, statements and events) through a
pool of PostgreSQL connections; what differs is here: connections and transactions, how a version number is
taken (a row lock on the segmentation, so replicas fitting the same segmentation at once never share a
number), where artifacts live, and the notifications that keep replicas in step.

The schema is created and upgraded by the numbered SQL files in ``migrations/``, applied at start-up in order,
each in its own transaction, under a PostgreSQL advisory lock (replicas starting at once take turns; the
applied numbers are kept in ``schema_migrations``).

Every write transaction ends with ``pg_notify('segscore_changes')``, delivered at commit; each process listens
on its own connection (``listen``) and wakes its background loop, which re-reads the counters. A notification
lost while the connection was down is covered by that loop's periodic check.

When the database cannot be reached, every call that needs it raises StoreUnavailable (503, with a detail that
says so); the serving cache keeps answering assigns from memory, and the pool reconnects by itself.
"""

from __future__ import annotations

import logging
import threading
from contextlib import contextmanager
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any, Callable, Iterator

import psycopg
from psycopg_pool import ConnectionPool, PoolTimeout

from service.core.bundle import Bundle
from service.errors import JobNotRunning, StoreUnavailable
from service.store.filesystem import CLI_ACTOR, LIVE_COUNTS_UPSERT, FilesystemStore, utc_now
from service.store.objects import ContentAddressedFiles

log = logging.getLogger("segscore.store")

NOTIFY_CHANNEL = "segscore_changes"
# pg_advisory_lock key of the migrations (any fixed 64-bit number; this one spells "segscore" in ASCII).
MIGRATION_LOCK = 0x7365677363_6F7265 & 0x7FFFFFFFFFFFFFFF
_DB_ERRORS = (psycopg.Error, PoolTimeout)


def _unavailable(what: str, exc: BaseException) -> StoreUnavailable:
    return StoreUnavailable(f"{what}: the store database is unavailable ({type(exc).__name__}); "
                            "try again when it is back")


@lru_cache(maxsize=512)
def _placeholders(sql: str) -> str:
    """The local index's statements use SQLite's ``?``; psycopg takes ``%s``."""
    return sql.replace("%", "%%").replace("?", "%s")


class _Row(tuple):
    """A row readable by position and by column name, as ``sqlite3.Row``."""

    names: dict[str, int]

    def __getitem__(self, key):  # type: ignore[override]
        return tuple.__getitem__(self, self.names[key] if isinstance(key, str) else key)

    def keys(self) -> list[str]:
        return list(self.names)


def _row_factory(cursor: psycopg.Cursor) -> Callable[[Any], _Row]:
    names = {column.name: i for i, column in enumerate(cursor.description or ())}
    row_class = type("Row", (_Row,), {"names": names})
    return lambda values: row_class(values)


class _Result:
    """A statement's rows, fetched at once (the connection goes back to the pool right after)."""

    def __init__(self, cursor: psycopg.Cursor) -> None:
        self.rowcount = cursor.rowcount
        self._rows = cursor.fetchall() if cursor.description else []

    def fetchone(self) -> _Row | None:
        return self._rows[0] if self._rows else None

    def fetchall(self) -> list[_Row]:
        return self._rows

    def __iter__(self):
        return iter(self._rows)


class _Session:
    """One connection inside a transaction, with the ``execute`` of an sqlite3 connection."""

    def __init__(self, connection: psycopg.Connection) -> None:
        self._connection = connection

    def execute(self, sql: str, params: tuple = ()) -> _Result:
        return _Result(self._connection.execute(_placeholders(sql), params))


class _Pooled:
    """Statements outside a transaction: each borrows a pooled connection for itself."""

    def __init__(self, pool: ConnectionPool) -> None:
        self._pool = pool

    def execute(self, sql: str, params: tuple = ()) -> _Result:
        try:
            with self._pool.connection() as connection:
                return _Result(connection.execute(_placeholders(sql), params))
        except _DB_ERRORS as exc:
            raise _unavailable("the store index cannot be read", exc) from None


def migrations() -> list[tuple[int, str, str]]:
    """(number, file name, SQL) of every migration, in order."""
    folder = resources.files("service.store") / "migrations"
    found = []
    for entry in folder.iterdir():
        if entry.name.endswith(".sql"):
            found.append((int(entry.name.split("_", 1)[0]), entry.name, entry.read_text()))
    return sorted(found)


def apply_migrations(connection: psycopg.Connection) -> list[int]:
    """Apply the migrations not yet applied, under the advisory lock; return the numbers applied now."""
    applied_now = []
    connection.execute("SELECT pg_advisory_lock(%s)", (MIGRATION_LOCK,))
    try:
        connection.commit()
        with connection.transaction():
            connection.execute("CREATE TABLE IF NOT EXISTS schema_migrations (version INTEGER PRIMARY KEY,"
                               " name TEXT NOT NULL, applied_at TEXT NOT NULL)")
        done = {row[0] for row in connection.execute("SELECT version FROM schema_migrations").fetchall()}
        connection.commit()
        for number, name, sql in migrations():
            if number in done:
                continue
            with connection.transaction():
                connection.execute(sql)
                connection.execute("INSERT INTO schema_migrations (version, name, applied_at) VALUES (%s, %s, %s)",
                                   (number, name, utc_now()))
            applied_now.append(number)
    finally:
        connection.execute("SELECT pg_advisory_unlock(%s)", (MIGRATION_LOCK,))
        connection.commit()
    return applied_now


class PostgresStore(FilesystemStore):
    """The index in PostgreSQL at ``url``; artifacts under ``artifact_dir`` (shared by every replica)."""

    _REPORT_ENGINE = "(report::jsonb ->> 'engine')"

    def __init__(self, url: str, artifact_dir: Path | str, *, pool_size: int = 4, timeout: float = 5.0) -> None:
        self.root = Path(artifact_dir)
        self.url = url
        self.files = ContentAddressedFiles(self.root)
        self._timeout = timeout
        self._listener: threading.Thread | None = None
        self._closing = threading.Event()
        statement_ms = int(timeout * 1000)

        def configure(connection: psycopg.Connection) -> None:
            # A query that hangs (a locked table, a dying server) fails after ``timeout`` instead of holding
            # a request and a connection.
            connection.execute(f"SET statement_timeout = {statement_ms}")
            connection.commit()

        self._pool = ConnectionPool(
            url, min_size=1, max_size=pool_size, timeout=timeout, open=False, configure=configure,
            check=ConnectionPool.check_connection,     # a connection broken by a restart is replaced
            kwargs={"connect_timeout": max(1, int(timeout)), "row_factory": _row_factory})
        try:
            self.root.mkdir(parents=True, exist_ok=True)
            self._pool.open(wait=True, timeout=timeout)
            with self._pool.connection() as connection:
                applied = apply_migrations(connection)
            if applied:
                log.info("store database: applied migration(s) %s", applied)
        except (OSError, *_DB_ERRORS) as exc:
            self._pool.close()
            raise StoreUnavailable(f"cannot open the postgres store ({type(exc).__name__}: "
                                   f"{str(exc).splitlines()[0] if str(exc) else 'no detail'})") from None

    def close(self) -> None:
        self._closing.set()
        self._pool.close()
        if self._listener is not None:
            self._listener.join(timeout=5)

    # ----------------------------------------------------------------- connections (replace SQLite's)
    def _db(self) -> _Pooled:  # type: ignore[override]
        return _Pooled(self._pool)

    @contextmanager
    def _transaction(self) -> Iterator[_Session]:  # type: ignore[override]
        with self._pool.connection() as connection:      # commits at the end, rolls back on an exception
            yield _Session(connection)
            connection.execute("SELECT pg_notify(%s, '')", (NOTIFY_CHANNEL,))

    @contextmanager
    def _writing(self, what: str) -> Iterator[_Session]:  # type: ignore[override]
        try:
            with self._transaction() as session:
                yield session
        except _DB_ERRORS as exc:
            raise _unavailable(f"{what} could not be written", exc) from None

    def _query(self, sql: str, params: tuple = ()) -> list:  # type: ignore[override]
        return self._db().execute(sql, params).fetchall()

    def listen(self, wake: Callable[[], None]) -> None:
        """Call ``wake`` whenever any process commits a write to this index (LISTEN/NOTIFY), from a thread of
        its own; a dropped connection is opened again every second until the store closes."""
        if self._listener is not None:
            return

        def run() -> None:
            while not self._closing.is_set():
                try:
                    with psycopg.connect(self.url, autocommit=True,
                                         connect_timeout=max(1, int(self._timeout))) as connection:
                        connection.execute(f"LISTEN {NOTIFY_CHANNEL}")
                        wake()      # changes made while we were not listening
                        while not self._closing.is_set():
                            for _ in connection.notifies(timeout=1.0):
                                wake()
                except psycopg.Error:
                    self._closing.wait(1.0)

        self._listener = threading.Thread(target=run, name="segscore-store-listener", daemon=True)
        self._listener.start()

    def add_live_counts(self, rows: list[tuple[str, int, int, int, int, int]]) -> None:
        """One transaction of upserts that add (replicas merge by addition), sent in one batch and without the
        change notification: live counts do not alter what is served, so other replicas need not wake."""
        try:
            with self._pool.connection() as connection:
                with connection.cursor() as cursor:
                    cursor.executemany(_placeholders(LIVE_COUNTS_UPSERT), rows)
        except _DB_ERRORS as exc:
            raise _unavailable("live drift counts could not be written", exc) from None

    # ----------------------------------------------------------------- artifacts (content-addressed)
    _ROW_LOCK = " FOR UPDATE"      # a job's row stays locked until the transaction that reads it ends

    def save_version(self, name: str, bundle: Bundle, *, make_live: bool | None,
                     actor: str = CLI_ACTOR, job_id: str | None = None) -> dict[str, Any]:
        bundle_sha, fitted_sha = self._put_artifacts(name, bundle)
        try:
            return self._index_version(name, bundle, make_live=make_live, actor=actor, job_id=job_id,
                                       bundle_sha=bundle_sha, fitted_sha=fitted_sha)
        except JobNotRunning:
            self._remove_unreferenced({bundle_sha, fitted_sha})     # the job's files go with its version
            raise

    def _keep_report_file(self, name: str, version: int, text: str) -> None:
        """Reports live in the shared index only: replicas keep no per-version files beside the artifacts."""

    def _index_version(self, name: str, bundle: Bundle, *, make_live: bool | None, actor: str, job_id: str | None,
                       bundle_sha: str, fitted_sha: str) -> dict[str, Any]:
        with self._writing(f"a version of '{name}'") as db:
            self._claim_job_for_version(db, job_id)
            now = utc_now()
            db.execute("INSERT INTO segmentations (name, live_version, last_version, created_at, updated_at)"
                       " VALUES (?, NULL, 0, ?, ?) ON CONFLICT (name) DO NOTHING", (name, now, now))
            # The row lock serializes fits of one segmentation across replicas: numbers are never shared.
            row = db.execute("SELECT last_version, live_version FROM segmentations WHERE name=? FOR UPDATE",
                             (name,)).fetchone()
            last, live = row["last_version"], row["live_version"]
            version = self._index_new_version(db, name, bundle, last=last, live=live, make_live=make_live,
                                              actor=actor, job_id=job_id, bundle_sha=bundle_sha,
                                              fitted_sha=fitted_sha, now=now)
        return self.version_report(name, version)

    # load, artifact_path, fitted_path and the deletions (objects no version names any more) are the local
    # backend's: both keep artifacts as content-addressed objects (service/store/objects.py).
    def _version_files(self, name: str, version: int) -> list[Path]:
        return []       # no per-segmentation folder

    def legacy_versions(self) -> list[tuple[str, int]]:
        return []       # the legacy pickle format predates this backend
