"""Fits run in worker processes, so that a long fit never holds the server's GIL or its cores.

``fit_in_worker`` starts one process per fit from a ``forkserver`` (a clean process that imported the
fitting code once, so a worker starts in milliseconds and inherits no threads or locks from the server),
pins it to ``FIT_WORKER_THREADS`` BLAS/OpenMP threads at a lower CPU priority (``FIT_WORKER_NICENESS``),
and waits for its answer at most ``time_limit`` seconds. The caller bounds how many run at once (``fit_concurrency``: the fit route's capacity limiter).

The worker only computes: it sends the fitted ``Bundle`` back over a private pipe and the server writes the
store (one writer, and a killed worker can leave nothing half-written behind). The pipe carries a pickle
from our own child process; nothing read from the store is ever unpickled.

- Past the time limit the worker is killed (SIGKILL) and ``FitTimeLimit`` raised.
- A worker that cannot start (for instance a TMPDIR too long for the forkserver's socket) raises
  ``FitWorkerCannotStart``.
- A worker that dies (SIGKILL, the kernel's out-of-memory killer, a crash) raises ``FitWorkerDied``.
- A refusal inside the fit (``InvalidInput`` and other ``ServiceError``) is re-raised as the same class.
- With ``progress``, the worker sends ``("progress", step, fraction)`` messages over the same pipe as the fit
  goes (the engine's callback) and the server calls ``progress(step, fraction)`` in the waiting thread.
- With ``cancel`` (a ``threading.Event``), setting it kills the worker within ``CANCEL_POLL_SECONDS`` and
  ``FitCancelled`` is raised; nothing was written.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import tempfile
import threading
import time
import traceback
from typing import Any, Callable

import numpy as np
from threadpoolctl import threadpool_limits

from service.core.bundle import Bundle, FitConfig
from service.engines import CLUSTER_ENGINE, run_engine
from service.engines.source import MatrixFile
from service.errors import FitCancelled, FitTimeLimit, FitWorkerCannotStart, FitWorkerDied, ServiceError

log = logging.getLogger("segscore")

# One BLAS/OpenMP thread per fit: on a small machine the fit then leaves the other cores to assign calls.
FIT_WORKER_THREADS = 1
# Fits are background work and assign calls are in someone's request path: the worker runs at a lower CPU
# priority, so when the machine is busy the kernel gives serving the cores first and the fit takes longer.
FIT_WORKER_NICENESS = 10
_CONTEXT = multiprocessing.get_context("forkserver")
_CONTEXT.set_forkserver_preload([__name__])
# How often the waiting thread looks at the cancel flag while the worker computes.
CANCEL_POLL_SECONDS = 0.2

_running: set[int] = set()
_running_lock = threading.Lock()


def running_fit_workers() -> list[int]:
    """Process ids of the fit workers running now (diagnostics and fault tests)."""
    with _running_lock:
        return sorted(_running)


def _work(connection, values: np.ndarray | MatrixFile, config: FitConfig, max_agglomerative_rows: int,
          engine: str = "memory", send_progress: bool = False) -> None:
    os.nice(FIT_WORKER_NICENESS)

    def progress(step: str, fraction: float) -> None:
        connection.send(("progress", step, fraction))

    try:
        with threadpool_limits(limits=FIT_WORKER_THREADS):
            bundle = run_engine(engine, values, config, max_agglomerative_rows=max_agglomerative_rows,
                                progress=progress if send_progress else None)
        message: tuple[Any, ...] = ("fitted", bundle)
    except ServiceError as exc:
        message = ("refused", type(exc), exc.detail, dict(exc.__dict__))
    except BaseException:  # noqa: BLE001 - reported to the server, which logs it and answers 500
        message = ("failed", traceback.format_exc(limit=20))
    connection.send(message)
    connection.close()


def _rebuild(cls: type[ServiceError], detail: Any, state: dict[str, Any]) -> ServiceError:
    """The worker's ServiceError, same class and attributes (subclass constructors take other arguments)."""
    error = cls.__new__(cls)
    Exception.__init__(error, detail)
    error.__dict__.update(state)
    return error


def _next_answer(receiver, worker, deadline: float, time_limit: float,
                 progress: Callable[[str, float], None] | None, cancel: threading.Event | None) -> tuple[Any, ...]:
    """The worker's answer; progress messages on the way go to ``progress``."""
    while True:
        if cancel is not None and cancel.is_set():
            raise FitCancelled()
        remaining = deadline - time.monotonic()
        if remaining <= 0:
            raise FitTimeLimit(time_limit)
        if not receiver.poll(min(remaining, CANCEL_POLL_SECONDS) if cancel is not None else remaining):
            continue
        try:
            message = receiver.recv()
        except (EOFError, OSError):
            worker.join(10)
            raise FitWorkerDied(worker.exitcode) from None
        if message[0] != "progress":
            return message
        if progress is not None:
            progress(message[1], message[2])


def fit_in_worker(values: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int,
                  time_limit: float, engine: str = "memory", progress: Callable[[str, float], None] | None = None,
                  cancel: threading.Event | None = None) -> Bundle:
    """The ``engine``'s fit (service.engines) in a worker process, stopped after ``time_limit`` seconds. Blocks:
    call from a thread. ``values``: the matrix, or a ``MatrixFile`` (big inputs: the worker reads the file).
    ``progress(step, fraction)`` receives the worker's steps; setting ``cancel`` kills the worker."""
    receiver, sender = _CONTEXT.Pipe(duplex=False)
    worker = _CONTEXT.Process(target=_work, args=(sender, values, config, max_agglomerative_rows, engine,
                                                  progress is not None),
                              name="segscore-fit", daemon=True)
    try:
        worker.start()
    except OSError as exc:
        sender.close()
        receiver.close()
        raise FitWorkerCannotStart(exc.strerror or str(exc), len(tempfile.gettempdir())) from exc
    sender.close()              # the worker holds the only sending end: its death reads as end of file
    with _running_lock:
        _running.add(worker.pid)
    try:
        message = _next_answer(receiver, worker, time.monotonic() + time_limit, time_limit, progress, cancel)
    finally:
        if worker.is_alive():
            worker.kill()
        worker.join()
        receiver.close()
        with _running_lock:
            _running.discard(worker.pid)
    if message[0] == "fitted":
        return message[1]
    if message[0] == "refused":
        raise _rebuild(*message[1:])
    log.error("the fit worker failed:\n%s", message[1])
    raise RuntimeError("the fit worker failed; see the server log")


# The cluster engine's steps, named as a job's steps are (``service.core.fit.STEP_START``).
_CLUSTER_STEPS = {"statistics": "scaling", "pca": "reducing", "kmeans": "clustering", "selection": "clustering",
                  "calibration": "profiling", "profiles": "profiling", "reference": "profiling"}


def run_fit(values: np.ndarray | MatrixFile | None, config: FitConfig, *, engine: str, source: Any, settings: Any,
            progress: Callable[[str, float], None] | None = None, cancel: threading.Event | None = None) -> Bundle:
    """One fit, where its engine runs: ``dask`` in this thread (it only waits for the cluster, whose workers hold
    the data), every other engine in a fit worker process (``fit_in_worker``). Blocks: call from a thread.
    ``values`` is None when the workers read ``source``; setting ``cancel`` stops either kind."""
    if engine != CLUSTER_ENGINE:
        return fit_in_worker(values, config, max_agglomerative_rows=settings.max_agglomerative_rows,
                             time_limit=settings.fit_time_limit_seconds, engine=engine, progress=progress,
                             cancel=cancel)
    from service.engines.dask_engine import CancelHook, run_dask_fit     # dask is imported only when used

    hook, finished = CancelHook(), threading.Event()

    def relay_cancel() -> None:
        while cancel is not None and not finished.wait(CANCEL_POLL_SECONDS):
            if cancel.is_set():
                hook.cancel()
                return

    def cluster_progress(step: str, fraction: float) -> None:
        if progress is not None:
            progress(_CLUSTER_STEPS.get(step, step), fraction)

    threading.Thread(target=relay_cancel, name="segscore-dask-cancel", daemon=True).start()
    try:
        matrix = values.load() if isinstance(values, MatrixFile) else values
        return run_dask_fit(matrix, config, source=source, settings=settings, progress=cluster_progress, cancel=hook)
    finally:
        finished.set()
