"""The serving cache: what the assign path reads, kept in memory above whichever backend holds the index.

``ServingCache`` implements ``BundleStore`` over a backend (``local`` or ``postgres``). It keeps

* the compiled serving versions (an LRU of ``bundle_cache_size`` entries),
* every segmentation's live version number,
* the segment labels of the versions that were served,

so that assigning a batch touches neither the index nor the artifact files once a version is loaded: the
database is never on the assign hot path, and a database that is down does not stop assigns.

Staying in step with other processes (replicas, ``segscore`` commands) works through the index's ``changes``
counter, which every write that alters what is served (a fit, a live-pointer change, a label, a deletion) bumps
in its own transaction. ``refresh`` (called by the server's background loop about every second, and at once
when the postgres backend hears a notification) re-reads the live pointers when the counter moved. A write made
through this cache refreshes it before it returns, so a caller always reads its own writes.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Any, Callable

import anyio

from service.core.bundle import Bundle
from service.errors import ServiceError, StoreUnavailable
from service.store.base import LoadedVersion, StoreBackend, StoredKey


class ServingCache:
    """``BundleStore`` over a backend, with the serving state in memory (see the module docstring)."""

    def __init__(self, backend: StoreBackend, *, cache_size: int = 16) -> None:
        self.backend = backend
        self._cache_size = cache_size
        self._cache: OrderedDict[tuple[str, int], LoadedVersion] = OrderedDict()
        # Versions that loaded and verified once and were then evicted: /readyz does not load them again.
        self._verified_evicted: set[tuple[str, int]] = set()
        # Live versions that ``warm`` could not load since the index last changed (not retried every second).
        self._warm_failed: set[tuple[str, int]] = set()
        self._labels: dict[tuple[str, int], dict[int, str]] = {}
        self._live: dict[str, int] = {}
        self._changes: int | None = None
        self._lock = threading.Lock()
        self._refresh_lock = threading.Lock()
        self.refresh()

    def __getattr__(self, attribute: str) -> Any:
        # What one backend alone offers (the local store's root and legacy upgrade, say).
        if attribute == "backend":
            raise AttributeError(attribute)
        return getattr(self.backend, attribute)

    # ----------------------------------------------------------------- staying in step
    def refresh(self, *, force: bool = False) -> bool:
        """Re-read the live pointers, and the labels of the versions held, if the index's ``changes`` counter
        moved (or ``force``); return whether it did. Raises StoreUnavailable when the index cannot be read: the
        state in memory then stays as it was, whole (nothing is dropped before its replacement is read).

        One refresh at a time: a background refresh that read the counter before a write cannot overwrite the
        state that the writer's own refresh read after it."""
        with self._refresh_lock:
            changes = self.backend.counters().get("changes", 0)
            if changes == self._changes and not force:
                return False
            live = self.backend.live_versions()
            existing = self.backend.version_keys()
            held = (set(self._cache) | set(live.items())) & set(self._labels) & existing
            labels = {key: self.backend.labels(*key) for key in held}
            with self._lock:
                self._live = live
                self._labels = labels
                for key in [k for k in self._cache if k not in existing]:
                    del self._cache[key]          # deleted elsewhere
                self._verified_evicted &= existing
                self._warm_failed.clear()
                self._changes = changes
            return True

    def watch(self, wake: Callable[[], None]) -> None:
        """Call ``wake`` (from any thread) when another process changed the index, if the backend can tell."""
        listen = getattr(self.backend, "listen", None)
        if listen is not None:
            listen(wake)

    def close(self) -> None:
        close = getattr(self.backend, "close", None)
        if close is not None:
            close()

    # ----------------------------------------------------------------- serving reads (memory first)
    def resolve_version(self, name: str, version: int | None) -> int:
        if version is None:
            live = self._live.get(name)
            if live is not None:
                return live
        elif (name, version) in self._cache:
            return version
        number = self.backend.resolve_version(name, version)
        if version is None:
            with self._lock:
                self._live.setdefault(name, number)
        return number

    def load(self, name: str, version: int) -> LoadedVersion:
        key = (name, version)
        with self._lock:
            hit = self._cache.get(key)
            if hit is not None:
                self._cache.move_to_end(key)
                return hit
        loaded = self.backend.load(name, version)
        with self._lock:
            self._cache[key] = loaded
            self._verified_evicted.discard(key)
            while len(self._cache) > self._cache_size:
                evicted, _ = self._cache.popitem(last=False)
                self._verified_evicted.add(evicted)
        return loaded

    def labels(self, name: str, version: int) -> dict[int, str]:
        known = self._labels.get((name, version))
        if known is None:
            known = self.backend.labels(name, version)
            with self._lock:
                self._labels[(name, version)] = known
        return known

    def _served_from_memory(self, name: str, version: int | None) -> tuple[LoadedVersion, dict[int, str]] | None:
        number = self._live.get(name) if version is None else version
        if number is None:
            return None
        loaded = self._cache.get((name, number))
        labels = self._labels.get((name, number))
        if loaded is None or labels is None:
            return None
        return loaded, labels

    def _serving_slow(self, name: str, version: int | None) -> tuple[LoadedVersion, dict[int, str]]:
        loaded = self.load(name, self.resolve_version(name, version))
        return loaded, self.labels(name, loaded.version)

    async def serving(self, name: str, version: int | None) -> tuple[LoadedVersion, dict[int, str]]:
        """The loaded version (``None``: the live one) and its labels: from memory, else read in a worker
        thread (index queries and artifact loads never run on the event loop)."""
        found = self._served_from_memory(name, version)
        if found is not None:
            return found
        return await anyio.to_thread.run_sync(self._serving_slow, name, version)

    def loaded_count(self) -> int:
        return len(self._cache)

    def readiness(self) -> list[dict[str, Any]]:
        """Problems of the live versions (empty: all good). Versions in memory, or loaded and verified once,
        are not loaded again, so a probe never evicts the versions being served. Raises StoreUnavailable."""
        self.backend.check()
        problems = []
        for name, version in sorted(self._live.items()):
            if (name, version) in self._cache or (name, version) in self._verified_evicted:
                continue
            try:
                self.load(name, version)
            except ServiceError as exc:
                problems.append({"segmentation": name, "version": version, "message": str(exc.detail)})
        return problems

    def warm(self) -> list[dict[str, Any]]:
        """Load the live versions not in memory yet, with their labels, so that assigns find them there even
        when the index is unreachable later: at start-up (every server process, each uvicorn worker, has its
        own cache) and after each background check, so a version made live elsewhere is held before it is
        asked for. A version loaded once and evicted since is left out (no churn when more versions are live
        than ``bundle_cache_size``); one that failed is not retried until the index changes. Returns the
        problems, as ``readiness``. Raises StoreUnavailable."""
        problems = []
        wanted = [key for key in sorted(self._live.items())
                  if key not in self._verified_evicted and key not in self._warm_failed]
        for name, version in wanted[: self._cache_size]:
            try:
                self.load(name, version)
                self.labels(name, version)
            except ServiceError as exc:
                if isinstance(exc, StoreUnavailable):
                    raise
                self._warm_failed.add((name, version))
                problems.append({"segmentation": name, "version": version, "message": str(exc.detail)})
        return problems

    def _forget(self, name: str, version: int | None = None) -> None:
        with self._lock:
            for key in [k for k in self._cache if k[0] == name and (version is None or k[1] == version)]:
                del self._cache[key]
            self._verified_evicted = {k for k in self._verified_evicted
                                      if not (k[0] == name and (version is None or k[1] == version))}

    # ----------------------------------------------------------------- writes (then read our own write)
    def save_version(self, name: str, bundle: Bundle, *, make_live: bool | None, **actor_and_job: Any) -> dict[str, Any]:
        report = self.backend.save_version(name, bundle, make_live=make_live, **actor_and_job)
        self.refresh(force=True)
        return report

    def set_live(self, name: str, version: int, **actor: str) -> dict[str, Any]:
        detail = self.backend.set_live(name, version, **actor)
        self.refresh(force=True)
        return detail

    def set_label(self, name: str, version: int, segment: int, label: str | None, **actor: str) -> dict[str, Any]:
        segment_row = self.backend.set_label(name, version, segment, label, **actor)
        self.refresh(force=True)
        return segment_row

    def delete_version(self, name: str, version: int, **actor: str) -> None:
        self.backend.delete_version(name, version, **actor)
        self._forget(name, version)
        self.refresh(force=True)

    def delete_segmentation(self, name: str, **actor: str) -> None:
        self.backend.delete_segmentation(name, **actor)
        self._forget(name)
        self.refresh(force=True)

    # ----------------------------------------------------------------- everything else goes to the backend
    def list_segmentations(self) -> list[dict[str, Any]]:
        return self.backend.list_segmentations()

    def get_segmentation(self, name: str) -> dict[str, Any]:
        return self.backend.get_segmentation(name)

    def version_report(self, name: str, version: int) -> dict[str, Any]:
        return self.backend.version_report(name, version)

    def save_drift_report(self, report: dict[str, Any]) -> None:
        self.backend.save_drift_report(report)

    def list_drift_reports(self, name: str, *, version: int | None, limit: int) -> list[dict[str, Any]]:
        return self.backend.list_drift_reports(name, version=version, limit=limit)

    def check(self) -> None:
        self.backend.check()

    def events(self, name: str | None, *, limit: int) -> list[dict[str, Any]]:
        return self.backend.events(name, limit=limit)

    def prune_drift_reports(self, older_than: str, **actor: str) -> int:
        return self.backend.prune_drift_reports(older_than, **actor)

    def add_live_counts(self, rows: list[tuple[str, int, int, int, int, int]]) -> None:
        self.backend.add_live_counts(rows)

    def live_counts(self, name: str, version: int, *, since: int) -> dict[int, int]:
        return self.backend.live_counts(name, version, since=since)

    def prune_live_counts(self, older_than: int, **actor: str) -> int:
        return self.backend.prune_live_counts(older_than, **actor)

    def create_key(self, name: str, scopes: list[str], **actor: str) -> str:
        return self.backend.create_key(name, scopes, **actor)

    def revoke_key(self, name: str, **actor: str) -> None:
        self.backend.revoke_key(name, **actor)

    def stored_keys(self) -> list[StoredKey]:
        return self.backend.stored_keys()

    def keys_counter(self) -> int:
        return self.backend.keys_counter()

    # ----------------------------------------------------------------- background fit jobs (not served state)
    def create_job(self, name: str, *, owner: str, **actor: str) -> dict[str, Any]:
        return self.backend.create_job(name, owner=owner, **actor)

    def job(self, job_id: str) -> dict[str, Any]:
        return self.backend.job(job_id)

    def jobs(self, name: str | None, *, limit: int) -> list[dict[str, Any]]:
        return self.backend.jobs(name, limit=limit)

    def job_progress(self, job_id: str, step: str, progress: float) -> str | None:
        return self.backend.job_progress(job_id, step, progress)

    def fail_job(self, job_id: str, error: Any) -> None:
        self.backend.fail_job(job_id, error)

    def cancel_job(self, job_id: str, **actor: str) -> dict[str, Any]:
        return self.backend.cancel_job(job_id, **actor)

    def heartbeat_jobs(self, owner: str) -> None:
        self.backend.heartbeat_jobs(owner)

    def fail_abandoned_jobs(self, *, alive_owner: str, heartbeat_before: str, error: Any) -> int:
        return self.backend.fail_abandoned_jobs(alive_owner=alive_owner, heartbeat_before=heartbeat_before,
                                                error=error)

    def fail_owned_jobs(self, owner: str, error: Any) -> int:
        return self.backend.fail_owned_jobs(owner, error)
