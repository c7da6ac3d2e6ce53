"""The live recorder: takes assigned batches off the assign path, counts them into time buckets, flushes the
buckets to the store, where replicas' counts merge by addition.

The assign route makes ONE call, ``observe`` (``observe_one`` for a single record scored as Python numbers),
after scoring: it appends references to the batch's checked matrix and its assignment to a queue (a lock, an
append and an addition, whatever the batch size). The queue holds at most
``MAX_QUEUED_BYTES`` of record values: past that, ``observe`` tallies on the caller's thread. A background thread
(``run``) then, every ``TALLY_SECONDS``, bins what is queued (``service.live.counts.tally``, vectorised over all
the queued records of a version at once), adds the counts to the bucket of the moment each batch was assigned,
and drops the records: values are held in memory only until that tally, and never written anywhere. Every
``flush_seconds`` the counts accumulated since the last flush are added to the store's rows
(``BundleStore.add_live_counts``, an upsert that adds) and forgotten here, so each record is counted in the
store exactly once, and a replica that dies loses at most the counts of its last ``flush_seconds``.
A flush that the store refuses keeps the counts for the next one.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import defaultdict, deque
from itertools import chain, groupby
from typing import Any, Callable

import numpy as np

from service.errors import ServiceError
from service.live.counts import CountLayout, build_layout, tally

log = logging.getLogger("segscore.live")

TALLY_SECONDS = 0.5
# Bytes of queued record values above which ``observe`` tallies at once on the caller's thread: the memory the
# queue may hold when the background thread falls behind (a count of batches would not bound it: 10,000 queued
# 1,000-row batches of 20 features hold 1.6 GB). Nothing is dropped: past the bound, the caller does the tally.
MAX_QUEUED_BYTES = 32 * 2**20
RETENTION_EVERY_SECONDS = 3600.0


def layout_of(loaded) -> CountLayout:
    """The count layout of a served version (``LoadedVersion``)."""
    reference = loaded.bundle.reference
    return build_layout(reference.bin_kinds, reference.bin_edges, loaded.compiled.k, reference.residual_sample,
                        loaded.compiled.has_residual)


def _column(parts: list) -> np.ndarray:
    """One column of queued assignments: arrays (``observe``) and Python numbers (``observe_one``), in order."""
    if not any(isinstance(part, np.ndarray) for part in parts):
        return np.array(parts)                               # single records only: one array build for all
    if len(parts) == 1:
        return parts[0]
    return np.concatenate([part if isinstance(part, np.ndarray) else np.array([part]) for part in parts])


def _rows(parts: list) -> np.ndarray:
    """The queued records' values as one (n, p) matrix, in order: (m, p) arrays (``observe``) and single rows of
    p numbers (``observe_one``), each run of single rows built as one array."""
    if len(parts) == 1 and _is_matrix(parts[0]):
        return parts[0]
    blocks = [np.concatenate(run) if matrices else _stack(run)
              for matrices, run in ((key, list(group)) for key, group in groupby(parts, key=_is_matrix))]
    return blocks[0] if len(blocks) == 1 else np.concatenate(blocks)


def _stack(rows: list) -> np.ndarray:
    """Rows of p numbers -> (n, p): read as one flat run of numbers (a third faster than ``np.array`` on tuples)."""
    p = len(rows[0])
    return np.fromiter(chain.from_iterable(rows), np.float64, count=len(rows) * p).reshape(len(rows), p)


def _is_matrix(part) -> bool:
    return isinstance(part, np.ndarray) and part.ndim == 2


class LiveOff:
    """The recorder when live drift is off (``SEGSCORE_LIVE_DRIFT=false``): nothing is kept."""

    enabled = False
    inline_tallies = 0

    def observe(self, loaded, values, assignment) -> None:
        return None

    def observe_one(self, loaded, row, segment, far, off_plane, residual) -> None:
        return None

    def queued_bytes(self) -> int:
        return 0

    def flush(self) -> int:
        return 0

    def start(self) -> None:
        return None

    def stop(self) -> None:
        return None


class LiveRecorder:
    """Counts of what assign sees, per version and time bucket (see the module docstring)."""

    enabled = True

    def __init__(self, store, *, bucket_seconds: int, flush_seconds: float, retention_days: int,
                 clock: Callable[[], float] = time.time, max_queued_bytes: int = MAX_QUEUED_BYTES) -> None:
        self.store = store
        self.bucket_seconds = int(bucket_seconds)
        self.flush_seconds = float(flush_seconds)
        self.retention_days = int(retention_days)
        self.clock = clock
        self.max_queued_bytes = int(max_queued_bytes)
        self._queue: deque = deque()
        self._queued_bytes = 0
        # guards the queue and its byte count together (observe may run on the event loop and in worker threads)
        self._queue_lock = threading.Lock()
        self.inline_tallies = 0          # times observe found the bound passed and tallied on the caller's thread
        self._layouts: dict[tuple[str, int], tuple[Any, CountLayout]] = {}
        # (name, version, bucket start) -> counts not yet in the store
        self._unflushed: dict[tuple[str, int, int], np.ndarray] = {}
        self._tally_lock = threading.Lock()
        self._flush_lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # ----------------------------------------------------------------- the assign path
    def observe(self, loaded, values: np.ndarray, assignment) -> None:
        """Queue one assigned batch (references only; no work here). ``values``: the checked matrix, NaN =
        missing, one row per assigned record."""
        # Only the four arrays the counts need are held (the rest of the assignment is freed with the answer).
        self._enqueue((loaded, values, assignment.segment, assignment.far, assignment.off_plane,
                       assignment.residual, self.clock()), values.nbytes)

    def observe_one(self, loaded, row, segment: int, far: bool, off_plane: bool, residual: float) -> None:
        """``observe`` for one record whose values (``row``: p numbers, a tuple or a 1-D array; NaN = missing)
        and assignment are Python numbers (the single-record call): the arrays the counts need are built
        for many such records at once, in ``tally``, off the assign path."""
        self._enqueue((loaded, row, segment, far, off_plane, residual, self.clock()), 8 * len(row))

    def _enqueue(self, item: tuple, nbytes: int) -> None:
        with self._queue_lock:
            self._queue.append(item)
            self._queued_bytes += nbytes
            over = self._queued_bytes > self.max_queued_bytes
        if over:    # the tally thread is behind: count here rather than hold unbounded memory
            self.inline_tallies += 1
            self.tally()

    # ----------------------------------------------------------------- background work
    def bucket_of(self, moment: float) -> int:
        return int(moment // self.bucket_seconds) * self.bucket_seconds

    def _layout(self, loaded) -> CountLayout:
        # Kept with the compiled arrays it was built for: a segmentation deleted and fitted again under the same
        # name and number is another version, with another layout.
        key = (loaded.name, loaded.version)
        held = self._layouts.get(key)
        if held is None or held[0] is not loaded.compiled:
            held = self._layouts[key] = (loaded.compiled, layout_of(loaded))
        return held[1]

    def tally(self) -> int:
        """Count every queued batch into its bucket and drop its records; return the records counted."""
        with self._tally_lock:
            with self._queue_lock:
                taken, self._queue, self._queued_bytes = self._queue, deque(), 0
            if not taken:
                return 0
            groups: dict[tuple[str, int, int], list] = defaultdict(list)
            loaded_of = {}
            for item in taken:
                loaded = item[0]
                key = (loaded.name, loaded.version, self.bucket_of(item[6]))
                groups[key].append(item)
                loaded_of[key] = loaded
            counted = 0
            for key, items in groups.items():
                layout = self._layout(loaded_of[key])
                # columns 1-5 of the queued items: values, segment, far, off_plane, residual
                values = _rows([item[1] for item in items])
                segment, far, off_plane, residual = (_column([item[i] for item in items]) for i in range(2, 6))
                counts = tally(layout, values, segment, far, off_plane, residual)
                with self._flush_lock:
                    held = self._unflushed.get(key)
                    self._unflushed[key] = counts if held is None else held + counts
                counted += values.shape[0]
            return counted

    def flush(self) -> int:
        """Tally, then add the unflushed counts to the store; return the store rows written. On a store error the
        counts stay here for the next flush (and the error is raised)."""
        self.tally()
        with self._flush_lock:
            pending, self._unflushed = self._unflushed, {}
        rows = []
        for (name, version, bucket), counts in pending.items():
            for slot in np.flatnonzero(counts).tolist():
                rows.append((name, version, bucket, self.bucket_seconds, slot, int(counts[slot])))
        if not rows:
            return 0
        rows.sort()     # one order for every replica: concurrent upserts of the same rows cannot deadlock
        try:
            self.store.add_live_counts(rows)
        except BaseException:
            with self._flush_lock:
                for key, counts in pending.items():
                    held = self._unflushed.get(key)
                    self._unflushed[key] = counts if held is None else held + counts
            raise
        return len(rows)

    def prune(self) -> int:
        cutoff = int(self.clock()) - self.retention_days * 86_400
        return self.store.prune_live_counts(cutoff)

    def run(self) -> None:
        """The background loop: tally every TALLY_SECONDS, flush every flush_seconds, retention every hour."""
        next_flush = time.monotonic() + self.flush_seconds
        next_prune = time.monotonic()
        while not self._stop.wait(min(TALLY_SECONDS, self.flush_seconds)):
            try:
                self.tally()
                now = time.monotonic()
                if now >= next_flush:
                    next_flush = now + self.flush_seconds
                    self.flush()
                if now >= next_prune:
                    next_prune = now + RETENTION_EVERY_SECONDS
                    gone = self.prune()
                    if gone:
                        log.info("live-count retention (%d days): deleted %d row(s)", self.retention_days, gone)
            except ServiceError as exc:      # the store is briefly unavailable: the counts wait here
                log.warning("live counts not flushed: %s", type(exc).__name__)
            except Exception:                # never let the loop die; the counts wait for the next round
                log.exception("live counts: background round failed")

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self.run, name="segscore-live-counts", daemon=True)
            self._thread.start()

    def stop(self) -> None:
        """Stop the loop and flush what is left (a clean shutdown loses nothing)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)
            self._thread = None
        try:
            self.flush()
        except Exception as exc:
            log.warning("live counts lost at shutdown: %s", type(exc).__name__)

    def queued_bytes(self) -> int:
        """Bytes of record values queued and not yet tallied (at most ``max_queued_bytes`` plus one batch)."""
        with self._queue_lock:
            return self._queued_bytes

    def unflushed_records(self) -> int:
        with self._flush_lock:
            return int(sum(int(c[0]) for c in self._unflushed.values()))


def open_live(settings, store) -> Any:
    """The recorder the settings ask for: ``LiveRecorder`` or, with ``live_drift`` off, ``LiveOff``."""
    if not settings.live_drift:
        return LiveOff()
    return LiveRecorder(store, bucket_seconds=settings.live_bucket_seconds, flush_seconds=settings.live_flush_seconds,
                        retention_days=settings.live_retention_days)
