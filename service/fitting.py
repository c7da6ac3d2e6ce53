"""Fits run in worker processes, so that a long fit never holds the server's GIL or its cores.

``fit_in_worker`` starts one process per fit from a ``forkserver`` (a clean process that imported the
fitting code once, so a worker starts in milliseconds and inherits no threads or locks from the server),
pins it to ``FIT_WORKER_THREADS`` BLAS/OpenMP threads, and waits for its answer at most ``time_limit``
seconds. The caller bounds how many run at once (``fit_concurrency``: the fit route's capacity limiter).

The worker only computes: it sends the fitted ``Bundle`` back over a private pipe and the server writes the
store (one writer, and a killed worker can leave nothing half-written behind). The pipe carries a pickle
from our own child process; nothing read from the store is ever unpickled.

- Past the time limit the worker is killed (SIGKILL) and ``FitTimeLimit`` raised.
- A worker that dies (SIGKILL, the kernel's out-of-memory killer, a crash) raises ``FitWorkerDied``.
- A refusal inside the fit (``InvalidInput`` and other ``ServiceError``) is re-raised as the same class.
"""

from __future__ import annotations

import logging
import multiprocessing
import threading
import traceback
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from service.core.bundle import Bundle, FitConfig
from service.engines import run_engine
from service.engines.source import MatrixFile
from service.errors import FitTimeLimit, FitWorkerDied, ServiceError

log = logging.getLogger("segscore")

# One BLAS/OpenMP thread per fit: on a small machine the fit then leaves the other cores to assign calls.
FIT_WORKER_THREADS = 1
_CONTEXT = multiprocessing.get_context("forkserver")
_CONTEXT.set_forkserver_preload([__name__])

_running: set[int] = set()
_running_lock = threading.Lock()


def running_fit_workers() -> list[int]:
    """Process ids of the fit workers running now (diagnostics and fault tests)."""
    with _running_lock:
        return sorted(_running)


def _work(connection, values: np.ndarray | MatrixFile, config: FitConfig, max_agglomerative_rows: int,
          engine: str = "memory") -> None:
    try:
        with threadpool_limits(limits=FIT_WORKER_THREADS):
            bundle = run_engine(engine, values, config, max_agglomerative_rows=max_agglomerative_rows)
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


def fit_in_worker(values: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int,
                  time_limit: float, engine: str = "memory") -> Bundle:
    """The ``engine``'s fit (service.engines) in a worker process, stopped after ``time_limit`` seconds. Blocks:
    call from a thread. ``values``: the matrix, or a ``MatrixFile`` (big inputs: the worker reads the file)."""
    receiver, sender = _CONTEXT.Pipe(duplex=False)
    worker = _CONTEXT.Process(target=_work, args=(sender, values, config, max_agglomerative_rows, engine),
                              name="segscore-fit", daemon=True)
    worker.start()
    sender.close()              # the worker holds the only sending end: its death reads as end of file
    with _running_lock:
        _running.add(worker.pid)
    try:
        if not receiver.poll(time_limit):
            raise FitTimeLimit(time_limit)
        try:
            message = receiver.recv()
        except (EOFError, OSError):
            worker.join(10)
            raise FitWorkerDied(worker.exitcode) from None
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
