"""Background fits: ``POST .../fit?background=true`` answers at once with a job; the fit runs here.

A job's life, as the store records it (``service.store``, both backends)::

    queued --(a fit slot is free)--> running --(version written)--> done
       |                                |
       +--------(DELETE /v1/jobs/ID)----+--> cancelled      (no version, ever)
       +--------(refused, error, server stopped)-+--> failed (error: the detail a synchronous fit answers)

- A job waits for one of the ``fit_concurrency`` slots shared with synchronous fits (``queued``), then runs
  ``fit_bundle`` in a worker process (``service.fitting``), whose progress messages update the job's ``step``
  and ``progress`` (at most every ``PROGRESS_WRITE_SECONDS``; progress never goes back).
- The server writes the version ('saving') with the job's id: the store checks, inside the transaction that
  writes the version, that the job still runs and marks it done there. A cancel that commits first leaves no
  version, whenever it arrives.
- Cancel: the store marks the job cancelled (any replica can, the store is shared); the runner that owns it
  kills the worker at once when the cancel came through it, or at its next progress write or heartbeat when it
  came through another replica.
- Jobs belong to the server process that runs them (``owner``), which refreshes their heartbeat every third of
  ``job_lease_seconds``. A server that stops marks its jobs failed; one that was killed cannot, so any server
  of the store marks failed the jobs whose heartbeat is older than the lease (at start-up, then on each beat).
- The job runs in its own task, not in the request: a client that disconnects does not stop it.
"""

from __future__ import annotations

import asyncio
import logging
import os
import socket
import threading
import time
import uuid
from contextlib import suppress
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import anyio
import numpy as np

from service.core.bundle import FitConfig
from service.core.fit import STEP_START
from service.errors import FitCancelled, JobNotRunning, ServiceError, StoreUnavailable
from service.engines.source import MatrixFile
from service.fitting import run_fit
from service.memory import release_free_memory
from service.inputs.streamed import remove_upload_directory
from service.store.base import ACTIVE_JOB_STATES, JOB_FIRST_STEP

log = logging.getLogger("segscore")

# A fit reports a step per candidate k; the store is written at most this often per job (the latest step wins).
PROGRESS_WRITE_SECONDS = 0.25
# How long a stopping server waits for its jobs' workers to be killed and their threads to end.
SHUTDOWN_WAIT_SECONDS = 15.0
STOPPED_ERROR = ("the server running this job stopped before the fit finished; no version was written; "
                 "start the fit again")
ABANDONED_ERROR = ("the server running this job stopped (it was killed or restarted) before the fit finished; "
                   "no version was written; start the fit again")
INTERNAL_ERROR = "internal error; see the server log (quote the job id)"


def _iso(moment: datetime) -> str:
    """The store's timestamp format (``service.store.filesystem.utc_now``)."""
    return moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


@dataclass
class _LocalJob:
    """A job this process runs: its task, its cancel flag, and whether its fit thread has started."""

    cancel: threading.Event = field(default_factory=threading.Event)
    task: asyncio.Task | None = None
    started: bool = False


class _ProgressWriter:
    """The worker's ``(step, fraction)`` messages -> the job record, throttled; sets ``cancel`` when the store
    says the job no longer runs (cancelled through another replica, or failed by a sweep)."""

    def __init__(self, store: Any, job_id: str, cancel: threading.Event) -> None:
        self.store, self.job_id, self.cancel = store, job_id, cancel
        self._last_write = 0.0

    def __call__(self, step: str, fraction: float) -> None:
        now = time.monotonic()
        if now - self._last_write < PROGRESS_WRITE_SECONDS:
            return
        self._last_write = now
        try:
            state = self.store.job_progress(self.job_id, step, fraction)
        except StoreUnavailable as exc:       # progress is best effort; the fit goes on
            log.warning("job %s: progress not recorded: %s", self.job_id, exc.detail)
            return
        if state != "running":
            self.cancel.set()


class JobRunner:
    """Runs the background fits of one server process; ``start`` in the app's lifespan, ``stop`` at its end."""

    def __init__(self, store: Any, settings: Any, metrics: Any = None) -> None:
        self.store, self.settings, self.metrics = store, settings, metrics
        self.owner = f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self._local: dict[str, _LocalJob] = {}
        self._limiter: anyio.CapacityLimiter | None = None
        self._beat: asyncio.Task | None = None

    # ------------------------------------------------------------------ lifespan
    async def start(self, fit_limiter: anyio.CapacityLimiter) -> None:
        self._limiter = fit_limiter
        await anyio.to_thread.run_sync(self._sweep)
        self._beat = asyncio.get_running_loop().create_task(self._heartbeat())

    async def stop(self) -> None:
        """Mark this process's jobs failed (first, so none of them can write its version any more), then stop
        their workers and wait for their threads."""
        if self._beat is not None:
            self._beat.cancel()
            with suppress(asyncio.CancelledError):
                await self._beat
        if not self._local:
            return
        try:
            await anyio.to_thread.run_sync(self.store.fail_owned_jobs, self.owner, STOPPED_ERROR)
        except ServiceError as exc:
            log.warning("jobs of this server could not be marked failed: %s", exc.detail)
        tasks = [job.task for job in self._local.values() if job.task is not None]
        for job_id in list(self._local):
            self._stop_local(job_id)
        if tasks:
            await asyncio.wait(tasks, timeout=SHUTDOWN_WAIT_SECONDS)

    # ------------------------------------------------------------------ requests
    async def submit(self, name: str, values: np.ndarray | MatrixFile, config: FitConfig, *,
                     make_live: bool | None, actor: str, engine: str = "memory",
                     work_dir: Path | None = None, source: Any = None) -> dict[str, Any]:
        """Record a queued job for a checked fit request and start it; return the job. The job owns
        ``work_dir`` (the upload's matrix file and the engine's scratch files) and removes it when it ends."""
        assert self._limiter is not None, "JobRunner.start was not called"
        job = await anyio.to_thread.run_sync(lambda: self.store.create_job(name, owner=self.owner, actor=actor))
        local = _LocalJob()
        self._local[job["id"]] = local
        local.task = asyncio.get_running_loop().create_task(
            self._run(job["id"], local, name, values, config, make_live, actor, engine, work_dir, source), name=f"segscore-job-{job['id']}")
        return job

    async def cancel(self, job_id: str, *, actor: str) -> dict[str, Any]:
        """Cancel a queued or running job (404 unknown, 409 finished); stop its fit if this process runs it."""
        job = await anyio.to_thread.run_sync(lambda: self.store.cancel_job(job_id, actor=actor))
        self._stop_local(job_id)
        return job

    def _stop_local(self, job_id: str) -> None:
        local = self._local.get(job_id)
        if local is None:
            return
        local.cancel.set()              # a running fit: its worker is killed within CANCEL_POLL_SECONDS
        if not local.started and local.task is not None:
            local.task.cancel()         # a queued job: stop waiting for a fit slot

    # ------------------------------------------------------------------ the job itself
    async def _run(self, job_id: str, local: _LocalJob, name: str, values: np.ndarray | MatrixFile,
                   config: FitConfig, make_live: bool | None, actor: str, engine: str,
                   work_dir: Path | None, source: Any) -> None:
        try:
            async with self._limiter:
                if local.cancel.is_set():
                    return
                local.started = True
                await anyio.to_thread.run_sync(self._fit_and_save, job_id, local.cancel, name, values, config,
                                               make_live, actor, engine, source)
                values = None
                await anyio.to_thread.run_sync(release_free_memory)    # as after a synchronous fit
        except asyncio.CancelledError:
            pass                        # cancelled while queued (its state is already set by the canceller)
        finally:
            self._local.pop(job_id, None)
            if work_dir is not None:
                remove_upload_directory(work_dir)

    def _fit_and_save(self, job_id: str, cancel: threading.Event, name: str, values: np.ndarray | MatrixFile,
                      config: FitConfig, make_live: bool | None, actor: str, engine: str, source: Any) -> None:
        settings = self.settings
        started = time.perf_counter()
        try:
            if self.store.job_progress(job_id, JOB_FIRST_STEP, STEP_START[JOB_FIRST_STEP]) != "running":
                return
            bundle = run_fit(values, config, engine=engine, source=source, settings=settings,
                             progress=_ProgressWriter(self.store, job_id, cancel), cancel=cancel)
            if cancel.is_set() or self.store.job_progress(job_id, "saving", STEP_START["saving"]) != "running":
                return
            # Writes the version only if the job still runs, and marks it done, in one transaction.
            self.store.save_version(name, bundle, make_live=make_live, actor=actor, job_id=job_id)
            if self.metrics is not None:
                self.metrics.fit_seconds.observe(time.perf_counter() - started)
                self.metrics.fits.inc()
        except (FitCancelled, JobNotRunning):
            log.info("job %s of '%s' stopped: cancelled or no longer running; no version written", job_id, name)
        except ServiceError as exc:
            log.info("job %s of '%s' failed: %s", job_id, name, type(exc).__name__)
            self._fail(job_id, exc.detail)
        except Exception:
            log.exception("job %s of '%s' failed with an internal error", job_id, name)
            self._fail(job_id, INTERNAL_ERROR)

    def _fail(self, job_id: str, detail: Any) -> None:
        try:
            self.store.fail_job(job_id, detail)
        except ServiceError as exc:
            log.error("job %s could not be marked failed: %s", job_id, exc.detail)

    # ------------------------------------------------------------------ heartbeat and sweep
    async def _heartbeat(self) -> None:
        period = self.settings.job_lease_seconds / 3
        while True:
            await asyncio.sleep(period)
            try:
                await anyio.to_thread.run_sync(self._beat_once)
            except Exception as exc:  # a store that is briefly unreachable must not end the loop
                log.warning("job heartbeat failed: %s", type(exc).__name__)

    def _beat_once(self) -> None:
        if self._local:
            self.store.heartbeat_jobs(self.owner)
            for job_id in list(self._local):
                try:
                    state = self.store.job(job_id)["state"]
                except ServiceError:
                    continue
                if state not in ACTIVE_JOB_STATES:      # cancelled through another replica, or swept
                    self._stop_local_threadsafe(job_id)
        self._sweep()

    def _stop_local_threadsafe(self, job_id: str) -> None:
        local = self._local.get(job_id)
        if local is None:
            return
        local.cancel.set()
        if not local.started and local.task is not None:
            local.task.get_loop().call_soon_threadsafe(local.task.cancel)

    def _sweep(self) -> None:
        before = _iso(datetime.now(timezone.utc) - timedelta(seconds=self.settings.job_lease_seconds))
        failed = self.store.fail_abandoned_jobs(alive_owner=self.owner, heartbeat_before=before,
                                                error=ABANDONED_ERROR)
        if failed:
            log.warning("%d background job(s) of a stopped server marked failed", failed)

