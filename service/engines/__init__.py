"""Fit engines: how a bundle is fitted from a training matrix (every engine makes the same kind of version).

- ``memory``: ``service.core.fit.fit_bundle`` on the whole matrix in memory (exact; the default below
  ``out_of_core_rows`` training rows).
- ``out_of_core``: ``service.engines.out_of_core.fit_out_of_core``, streaming passes over the matrix file.
- ``dask`` (``CLUSTER_ENGINE``): ``service.engines.dask_engine.run_dask_fit`` on the cluster at
  SEGSCORE_DASK_SCHEDULER; it runs in a thread of the server (the workers hold the data), not in a fit worker.

The names a request may give are ``schemas.fit.FIT_ENGINES`` plus ``auto`` (one list, shared with the request
model); ``ENGINES`` maps each engine of a fit worker to its function, and with ``CLUSTER_ENGINE`` they are checked
against that list at import. Every worker engine is called as ``engine(source, config, *, max_agglomerative_rows, progress)`` with ``source`` a numpy
matrix or a ``MatrixFile``, and returns a ``Bundle`` whose report's ``engine`` names it.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from schemas.fit import AUTO_ENGINE, FIT_ENGINES
from service.core.bundle import Bundle, FitConfig
from service.core.fit import check_fit_facts, check_fit_inputs, fit_bundle
from service.engines.out_of_core import Progress, fit_out_of_core
from service.engines.source import MatrixFile
from service.errors import InvalidInput


def fit_in_memory(source: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int = 20_000,
                  progress: Progress | None = None) -> Bundle:
    """Today's exact fit on the whole matrix (``fit_bundle`` reports its steps to ``progress``)."""
    values = source.load() if isinstance(source, MatrixFile) else source
    return fit_bundle(values, config, max_agglomerative_rows=max_agglomerative_rows, progress=progress)


def _out_of_core(source: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int = 20_000,
                 progress: Progress | None = None) -> Bundle:
    if isinstance(source, MatrixFile):
        return fit_out_of_core(source, config, max_agglomerative_rows=max_agglomerative_rows, progress=progress)
    import tempfile
    from pathlib import Path
    with tempfile.TemporaryDirectory(prefix="segscore-fit-") as scratch:
        matrix = MatrixFile.write(Path(scratch) / "values.f64", source)
        return fit_out_of_core(matrix, config, max_agglomerative_rows=max_agglomerative_rows, progress=progress)


Engine = Callable[..., Bundle]
ENGINES: dict[str, Engine] = {"memory": fit_in_memory, "out_of_core": _out_of_core}
CLUSTER_ENGINE = "dask"
if (*ENGINES, CLUSTER_ENGINE) != FIT_ENGINES:
    raise RuntimeError(f"service.engines {(*ENGINES, CLUSTER_ENGINE)} must match schemas.fit.FIT_ENGINES {FIT_ENGINES}")


def resolve_engine(requested: str, n_rows: int | None, settings: Any) -> str:
    """The engine that runs. ``n_rows`` None: the data is a ``source`` that only the cluster reads.

    ``auto``: dask for a source, or above ``dask_auto_rows`` rows when a scheduler is set; otherwise memory up
    to ``out_of_core_rows`` (and the memory engine's own ``max_fit_rows``), out_of_core above."""
    wants_cluster = requested == CLUSTER_ENGINE or (
        requested == AUTO_ENGINE and settings.dask_scheduler and (n_rows is None or n_rows > settings.dask_auto_rows))
    if wants_cluster:
        if not settings.dask_scheduler:
            raise InvalidInput("engine 'dask' needs a Dask scheduler; the server has none (setting "
                               "SEGSCORE_DASK_SCHEDULER)", field="engine")
        return CLUSTER_ENGINE
    if n_rows is None:
        raise InvalidInput(f"a source is read by the Dask engine; engine {requested!r} cannot read it"
                           + ("" if settings.dask_scheduler else " (and the server has no SEGSCORE_DASK_SCHEDULER)"),
                           field="engine")
    if requested == AUTO_ENGINE:
        return "out_of_core" if n_rows > min(settings.out_of_core_rows, settings.max_fit_rows) else "memory"
    return requested


def run_engine(name: str, source: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int,
               progress: Progress | None = None) -> Bundle:
    return ENGINES[name](source, config, max_agglomerative_rows=max_agglomerative_rows, progress=progress)


def check_before_fit(source: np.ndarray | MatrixFile, config: FitConfig, *, max_agglomerative_rows: int) -> None:
    """What a fit would refuse, checked before a background job is queued. A matrix in memory gets every check
    the fit makes; a matrix file (big inputs) those that need no pass over the data (its shape and the
    parameters). The rest (unusable features, too few distinct records) then run in the job, whose ``error`` is
    the detail a synchronous fit answers."""
    if isinstance(source, MatrixFile):
        check_fit_facts(source.shape, config, max_agglomerative_rows=max_agglomerative_rows,
                        unusable=dict, distinct_at_least=lambda needed: needed)
    else:
        check_fit_inputs(source, config, max_agglomerative_rows=max_agglomerative_rows)
