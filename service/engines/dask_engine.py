"""Fit a bundle on a Dask cluster: the workers read the data where it lies; the server sees aggregates only.

``fit_on_dask(source, config, client=...)`` returns an ordinary ``Bundle`` (same artifact, same report as the
in-memory fit in ``service.core.fit``, plus ``engine: "dask"`` and the cluster's worker count). Each step is
a reduction over the blocks of the training matrix, which stays on the workers (persisted; a lost worker's
blocks are recomputed from the source by Dask):

- column statistics (two-pass mean and variance), medians and robust-scaling quantiles: exact order
  statistics by histogram narrowing (``dask_ops.select``), not approximations;
- PCA: the tall-skinny QR/SVD of the centred, scaled matrix (``dask.array.linalg.svd``; Benson, Gleich &
  Demmel 2013), signs fixed as scikit-learn's ``svd_flip`` does;
- k-means for every k of the range: one k-means|| candidate set (Bahmani et al. 2012, oversampling 2 k_max,
  5 rounds), re-clustered locally for each k by weighted k-means++ with ``n_init`` starts, then Lloyd
  iterations for all k at once, one pass per iteration (scikit-learn's tolerance and iteration limit; an
  empty cluster keeps its centre, where scikit-learn moves it to a far point);
- silhouette on a seeded sample of rows gathered to the server (``silhouette_sample`` rows);
- held-out thresholds as in ``service.core.calibration`` (5 folds, split-conformal, leave-one-out baseline),
  with these differences, all stated in the report's ``calibration``: folds are drawn per row from a seeded
  counter-based generator at the row's index (``dask_ops.row_bits``: the same however the rows are split), not
  stratified by segment as in memory (that needs each row's rank among its segment's rows in one global seeded
  permutation: a global sort, not a per-block step); each fold's scaler and PCA come from the folds' sufficient statistics
  (sums and cross products); the imputation medians (and robust scaling) are the full data's, not refitted
  per fold; order statistics are exact;
- profiles (means, population standard deviations, medians of each segment's observed values), drift
  reference (bins, moments, the same seeded sample of rows as the in-memory fit).

Cancel: ``CancelHook.cancel()`` (from any thread) cancels the cluster's futures of the fit and makes it raise
``FitCancelled``. A lost scheduler raises ``ClusterUnavailable``. Neither writes anything: the caller saves
the returned bundle.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import threading
import time
from concurrent.futures import CancelledError as FuturesCancelled
from functools import partial
from typing import Any, Callable

import numpy as np
import sklearn
from sklearn.cluster import KMeans
from sklearn.decomposition import PCA
from sklearn.impute import SimpleImputer
from sklearn.metrics import silhouette_score
from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler
from sklearn.utils.extmath import svd_flip

from service.core.assign import elementwise_scaling
from service.core.bundle import Bundle, FitConfig, ReferenceProfile
from service.core.calibration import MIN_CROSS_FIT_ROWS, MIN_MEDIAN_ROWS, min_own_rows
from service.core.fit import (
    DECILES,
    DIGEST_CHUNK_ROWS,
    MAX_CATEGORIES,
    MIN_SPREAD,
    NEAR_CONSTANT_RTOL,
    SCALERS,
    choose_k,
    chunk_digest,
    combine_chunk_digests,
    fit_warnings_from_counts,
    jackson_mudholkar_limit,
)
from service.core.frame import MAX_ABS_VALUE
from service.core.report import fit_report
from service.engines import dask_ops as ops
from service.engines.dask_ops import N_FOLDS, Steps, Where
from service.engines.sources import DataSource
from service.errors import ClusterUnavailable, FitCancelled, InvalidInput, RecordProblem

log = logging.getLogger("segscore")

ENGINE = "dask"
KMEANS_PARALLEL_ROUNDS = 5          # Bahmani et al. 2012 find 5 rounds enough in practice
KMEANS_PARALLEL_MAX_ROUNDS = 20     # more rounds only while fewer distinct candidates than k_max were drawn
MAX_ITER = 300                      # scikit-learn's KMeans defaults
TOL = 1e-4
MAX_BLOCK_ROWS = 200_000            # rows per block kept on a worker (a larger partition is sliced)
MIN_BLOCK_ROWS = 10_000             # ... and no smaller than this when slicing to spread the rows
CSV_BLOCK_SIZE = "64MB"             # bytes of a CSV file per partition (a larger file is split)
SILHOUETTE_WORKING_MIB = 64          # scikit-learn's chunk size for the silhouette's pairwise distances
WAIT_SECONDS = 0.25                 # how often a waiting fit looks at its cancel hook and the scheduler
SCHEDULER_GRACE_SECONDS = 10.0      # a scheduler gone this long fails the fit
FAN_IN = 8                          # block results merged per task of the merge tree on the workers

Progress = Callable[[str, float], None]

# Steps of a fit and the share of the progress bar each starts at.
STAGES = {"reading": 0.0, "statistics": 0.05, "pca": 0.2, "kmeans": 0.3, "selection": 0.6, "calibration": 0.65,
          "profiles": 0.9, "reference": 0.95}


class CancelHook:
    """Cancels one Dask fit from another thread (the job layer's cancel): ``cancel()`` cancels every future the
    fit holds on the cluster and the fit raises ``FitCancelled`` at its next wait."""

    def __init__(self) -> None:
        self._event = threading.Event()
        self._lock = threading.Lock()
        self._futures: list[Any] = []
        self._client: Any = None

    @property
    def cancelled(self) -> bool:
        return self._event.is_set()

    def cancel(self) -> None:
        self._event.set()
        with self._lock:
            futures, client = list(self._futures), self._client
        if futures and client is not None:
            try:
                client.cancel(futures)
            except Exception:  # noqa: BLE001 - the cluster may be gone already; the fit stops anyway
                log.warning("cancelling the Dask futures of a fit failed", exc_info=True)

    def _hold(self, client: Any, futures: list[Any]) -> None:
        with self._lock:
            self._client = client
            self._futures.extend(futures)

    def _release(self, futures: list[Any]) -> None:
        with self._lock:
            held = {id(f) for f in futures}
            self._futures = [f for f in self._futures if id(f) not in held]


class _Cluster:
    """The fit's link to the cluster: runs block functions, waits while watching the hook and the scheduler."""

    def __init__(self, client: Any, hook: CancelHook, blocks: list[Any], wheres: list[Where]) -> None:
        self.client = client
        self.hook = hook
        self.blocks = blocks
        self.wheres = wheres

    def compute(self, *collections: Any) -> list[Any]:
        if self.hook.cancelled:
            raise FitCancelled()
        try:
            futures = self.client.compute(list(collections))
        except (OSError, TimeoutError) as exc:
            raise ClusterUnavailable(self.client.scheduler.address, f"cannot be reached ({type(exc).__name__})") from exc
        self.hook._hold(self.client, futures)
        try:
            return self._wait(futures)
        finally:
            self.hook._release(futures)

    def _wait(self, futures: list[Any]) -> list[Any]:
        lost_since = None
        pause = 0.005
        while True:
            if self.hook.cancelled:
                raise FitCancelled()
            if all(future.done() for future in futures):
                break
            time.sleep(pause)
            pause = min(pause * 2, WAIT_SECONDS)
            if self.client.status != "running":
                lost_since = lost_since or time.monotonic()
                if time.monotonic() - lost_since > SCHEDULER_GRACE_SECONDS:
                    raise ClusterUnavailable(self._address(), "was lost during the fit")
            else:
                lost_since = None
        try:
            return self.client.gather(futures)
        except FuturesCancelled as exc:
            if self.hook.cancelled:
                raise FitCancelled() from exc
            raise ClusterUnavailable(self._address(), "was lost during the fit (its work was cancelled)") from exc
        except OSError as exc:
            if self.client.status == "running":
                raise               # raised by a task (a file the workers cannot open), not by the connection
            raise ClusterUnavailable(self._address(), f"was lost during the fit ({type(exc).__name__})") from exc

    def _address(self) -> str | None:
        try:
            return self.client.scheduler.address
        except Exception:  # noqa: BLE001
            return None

    def reduce(self, fn: Callable, *args: Any) -> Any:
        """``fn(block, where, *args)`` on every block, merged by ``dask_ops.COMBINE[fn]``: all on the workers.

        The blocks' results are merged in a tree (groups of FAN_IN consecutive results, level by level), so this
        process receives one merged result, whatever the number of blocks: gathering every block's result here
        made the server's peak grow with the blocks (a narrowing pass's histograms are a few MB per block). The
        arguments (centroids, projections, fold models) enter the graph once, as one shared object, not once
        per block's task."""
        import dask

        combine = ops.COMBINE[fn]
        shared = dask.delayed(args, traverse=False)
        call = dask.delayed(ops.apply_block, pure=True)
        level = [call(fn, block, where, shared) for block, where in zip(self.blocks, self.wheres)]
        merge = dask.delayed(combine, pure=True)
        while len(level) > 1:
            level = [merge(level[i:i + FAN_IN]) for i in range(0, len(level), FAN_IN)]
        return self.compute(*level)[0]

    def select(self, producer: Callable, queries: list[tuple[int, int]]) -> np.ndarray:
        return ops.select(self.reduce, producer, queries)

    def medians(self, producer: Callable, counts: dict[int, int]) -> dict[int, float]:
        """np.median of each group's values (the mean of the two middle values for an even count)."""
        found = ops.linear_quantiles(self.reduce, producer, counts,
                                     {g: np.array([0.5]) for g, n in counts.items() if n > 0})
        return {g: float(found[g][0]) if g in found else math.nan for g in counts}

    def rows(self, rows: np.ndarray) -> np.ndarray:
        """The raw rows at sorted global indices ``rows`` (a seeded sample)."""
        return self.reduce(ops.seed_rows, rows)


# --------------------------------------------------------------------------- reading
def _numeric(dtype: Any) -> bool:
    import pandas as pd

    return pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_bool_dtype(dtype)


class NotNumeric(ValueError):
    """A feature column of a partition holds a value that is not a number (raised on a worker; the message names
    the column, never the value)."""


def _to_matrix(part: Any, features: list[str]) -> np.ndarray:
    import pandas as pd

    columns = []
    for name in features:
        try:
            columns.append(pd.to_numeric(part[name], errors="raise"))
        except (ValueError, TypeError):
            raise NotNumeric(f"column {name!r} holds a value that is not a number") from None
    return np.ascontiguousarray(np.column_stack([c.to_numpy(dtype=np.float64, na_value=np.nan) for c in columns])
                                if columns else np.empty((len(part), 0)))


def _csv_header(file: Any) -> tuple[str, ...]:
    import pandas as pd

    with file as handle:
        return tuple(pd.read_csv(handle, nrows=0).columns)


def _check_csv_headers(cluster: "_Cluster", source: DataSource) -> None:
    """Every CSV file of a source must start with the first file's header row. Dask reads each file under its own
    header, so a file whose header differs would give its rows under other names, or a file without a header
    would lose its first row to the names. The workers read the header lines; the refusal names the files, not
    their headers (a data row taken for a header holds record values)."""
    import dask
    import fsspec

    files = fsspec.open_files(list(source.paths), mode="rb", compression="infer")
    if not files:
        raise InvalidInput("the source names no file (nothing matches it)", field="source")
    headers = cluster.compute(*[dask.delayed(_csv_header, pure=True)(file) for file in files])
    odd = [file.path for file, header in zip(files, headers) if header != headers[0]]
    if odd:
        raise InvalidInput(f"every CSV file of a source must have the header row of the first file "
                           f"({files[0].path}, {len(headers[0])} columns); {len(odd)} file(s) differ: "
                           f"{', '.join(odd[:5])}" + (" ..." if len(odd) > 5 else ""), field="source")


def _open(source: DataSource, config: FitConfig) -> tuple[list[Any], list[str]]:
    """Lazy per-partition matrices of the source's feature columns (nothing is read here)."""
    import dask
    import dask.dataframe as dd

    if source.format == "parquet":
        frame = dd.read_parquet(list(source.paths))
    else:
        frame = dd.read_csv(list(source.paths), assume_missing=True, blocksize=CSV_BLOCK_SIZE)
    columns = list(frame.columns)
    if config.id_column is not None and config.id_column not in columns:
        raise InvalidInput(f"id_column {config.id_column!r} is not a column of the source", field="id_column")
    if config.features:
        features = list(config.features)
        unknown = [f for f in features if f not in columns]
        if unknown:
            raise InvalidInput(f"unknown column(s) {unknown[:10]}; the source has: {', '.join(columns[:30])}",
                               field="features")
        if config.id_column in features:
            raise InvalidInput(f"id_column {config.id_column!r} cannot also be a feature", field="features")
        text = [f for f in features if not _numeric(frame.dtypes[f])]
        if text and source.format == "parquet":
            raise InvalidInput(f"column(s) {text[:10]} of the source are not numeric", field="features")
    else:
        features = [c for c in columns if c != config.id_column and _numeric(frame.dtypes[c])]
        if not features:
            raise InvalidInput("the source has no numeric columns; name the features explicitly", field="features")
    if source.format == "csv":
        # The features are read as text and converted by ``_to_matrix``: Dask's own conversion of a column whose
        # type it guessed from the first file's first lines fails with a message (and a worker log) quoting the
        # cells; ours names the column only. Both parse to the same correctly rounded float64.
        frame = dd.read_csv(list(source.paths), blocksize=CSV_BLOCK_SIZE, usecols=features,
                            dtype={name: "str" for name in features})
    call = dask.delayed(_to_matrix, pure=True)
    return [call(part, features) for part in frame[features].to_delayed()], features


# --------------------------------------------------------------------------- checks on aggregates
def _column_checks(stats: dict[str, Any], features: list[str], config: FitConfig, named: bool
                   ) -> tuple[list[int], tuple[tuple[str, str], ...]]:
    """Columns to keep and the dropped ones with why (default features), or InvalidInput (named features):
    the rules of ``service.core.fit.unusable_features`` applied to the column statistics."""
    problems, reasons = [], {}
    for j, name in enumerate(features):
        if stats["infinite"][j]:
            problems.append(RecordProblem(None, name, "the column holds infinite values; every value must be finite"))
            continue
        if stats["observed"][j] == 0:
            reasons[name] = "every value is missing"
            continue
        scale = float(stats["abs_max"][j])
        spread = float(stats["std"][j])
        if scale > MAX_ABS_VALUE:
            reasons[name] = f"a value exceeds the limit |x| <= {MAX_ABS_VALUE:g}; its squares would overflow float64"
        elif 0 < spread < MIN_SPREAD and spread > NEAR_CONSTANT_RTOL * scale:
            reasons[name] = (f"its spread (std) is below {MIN_SPREAD:g}, too small to compute with in float64; "
                             "express it in other units")
        elif spread <= NEAR_CONSTANT_RTOL * scale:
            reasons[name] = ("constant" if stats["max"][j] == stats["min"][j] else
                             f"near-constant (std at most {NEAR_CONSTANT_RTOL:g} x its largest |value|)") + \
                ": no information to cluster on"
    if problems:
        raise InvalidInput(problems)
    if reasons and named:
        raise InvalidInput([RecordProblem(None, name, f"feature cannot be used: {why}; remove it from 'features'")
                            for name, why in reasons.items()])
    keep = [j for j, name in enumerate(features) if name not in reasons]
    if not keep:
        raise InvalidInput([RecordProblem(None, f, f"feature cannot be used: {why}") for f, why in reasons.items()])
    return keep, tuple(reasons.items())


def _config_checks(config: FitConfig, n_records: int, n_features: int) -> None:
    problems: list[RecordProblem] = []
    if config.method != "kmeans":
        problems.append(RecordProblem(None, "method", "the Dask engine fits k-means only (agglomerative clustering "
                                      "needs every row in one place); use method 'kmeans' or another engine"))
    if config.scaling not in SCALERS:
        problems.append(RecordProblem(None, "scaling", f"must be one of {list(SCALERS)}, got {config.scaling!r}"))
    if n_records < max(2, MIN_CROSS_FIT_ROWS):
        problems.append(RecordProblem(None, "records", f"need at least {MIN_CROSS_FIT_ROWS} records on the Dask "
                                      f"engine, got {n_records}"))
    if not 1 <= config.k_min <= config.k_max:
        problems.append(RecordProblem(None, "k", f"need 1 <= min <= max, got min={config.k_min}, max={config.k_max}"))
    elif config.k_max > n_records - 1:
        problems.append(RecordProblem(None, "k", f"k must lie in [1, n_records - 1] = [1, {n_records - 1}]; "
                                      f"got max {config.k_max}"))
    components = config.components
    if components is not None and not isinstance(components, bool):
        if isinstance(components, int) and not 1 <= components <= min(n_features, n_records):
            problems.append(RecordProblem(None, "components", f"must lie in [1, min(n_features, n_records)] = "
                                          f"[1, {min(n_features, n_records)}]; got {components}"))
        elif isinstance(components, float) and not 0.0 < components < 1.0:
            problems.append(RecordProblem(None, "components", f"a variance share must lie in (0, 1); got {components}"))
    if not 0.5 <= config.outlier_quantile < 1.0:
        problems.append(RecordProblem(None, "outlier_quantile", f"must lie in [0.5, 1); got {config.outlier_quantile}"))
    if config.n_init < 1:
        problems.append(RecordProblem(None, "n_init", f"must be >= 1; got {config.n_init}"))
    if problems:
        raise InvalidInput(problems)


# --------------------------------------------------------------------------- fitted scikit-learn steps
def _fitted_like(estimator: Any, p: int, **state: Any) -> Any:
    """A scikit-learn estimator fitted on a tiny seeded matrix (so every private attribute exists), then given
    the statistics computed on the cluster."""
    dummy = np.random.default_rng(0).normal(size=(max(p + 1, 3), p))
    estimator.fit(dummy)
    for name, value in state.items():
        setattr(estimator, name, value)
    return estimator


def _fitted_kmeans(centroids: np.ndarray, inertia: float, config: FitConfig) -> KMeans:
    """A KMeans holding the cluster's centroids (no ``labels_``: the rows' labels stay on the cluster)."""
    k, d = centroids.shape
    model = KMeans(n_clusters=k, n_init=1, random_state=config.seed)
    model.fit(np.random.default_rng(0).normal(size=(k + 2, d)))
    model.set_params(n_init=config.n_init)
    model.cluster_centers_ = centroids.copy()
    model.inertia_ = inertia
    del model.labels_
    return model


def _zero_safe(scale: np.ndarray) -> np.ndarray:
    """scikit-learn's ``_handle_zeros_in_scale``: scales near zero become 1."""
    scale = np.asarray(scale, dtype=float).copy()
    scale[scale < 10 * np.finfo(scale.dtype).eps] = 1.0
    return scale


# --------------------------------------------------------------------------- the fit
def fit_on_dask(source: DataSource, config: FitConfig, *, client: Any, progress: Progress | None = None,
                cancel: CancelHook | None = None) -> Bundle:
    """Fit the whole bundle on the cluster behind ``client`` (a ``distributed.Client``).

    ``config.features`` empty: every numeric column of the source except ``id_column`` (unusable ones dropped
    with a warning, as the in-memory fit does). ``progress(step, fraction)`` is called as the fit moves on;
    ``cancel`` lets another thread stop it (``FitCancelled``). Only aggregates and seeded samples reach this
    process.
    """
    hook = cancel or CancelHook()
    report_progress = progress or (lambda step, fraction: None)
    report_progress("reading", STAGES["reading"])
    if source.format == "csv":
        _check_csv_headers(_Cluster(client, hook, [], []), source)
    lazy, features = _open(source, config)
    held: list[Any] = []            # the futures of the data persisted on the workers
    try:
        return _fit(lazy, features, config, client, hook, report_progress, source, held)
    finally:
        hook._release(held)
        try:
            client.cancel(held)         # free the workers' copies of the data
        except Exception:  # noqa: BLE001 - a lost scheduler has freed them already
            pass


def _futures_of(client: Any, delayed: Any) -> list[Any]:
    from distributed.client import futures_of

    return futures_of(delayed)


def _rows(block: np.ndarray, start: int, stop: int) -> np.ndarray:
    return block[start:stop]


def _persist(client: Any, hook: CancelHook, blocks: list[Any], held: list[Any]) -> list[Any]:
    """Keep ``blocks`` in the workers' memory (a lost worker's blocks are recomputed from their source)."""
    persisted = client.persist(blocks)
    futures = [f for d in persisted for f in _futures_of(client, d)]
    held.extend(futures)
    hook._hold(client, futures)
    return persisted


def _fit(blocks: list[Any], features: list[str], config: FitConfig, client: Any, hook: CancelHook,
         progress: Progress, source: DataSource, held: list[Any]) -> Bundle:
    import dask
    import dask.array as da

    named = bool(config.features)
    wheres_stub = [Where(i, 0) for i in range(len(blocks))]
    try:
        lengths = _Cluster(client, hook, blocks, wheres_stub).compute(*[dask.delayed(len)(b) for b in blocks])
    except (NotNumeric, FileNotFoundError) as exc:
        # Raised on a worker while reading: our own message (a column, never a value), a file gone since the
        # request (its path).
        raise InvalidInput(f"the workers could not read the source: {str(exc)[:300]}", field="source") from exc
    except (ValueError, TypeError, KeyError) as exc:
        # A parser's or Dask's own message may quote cells (a dtype mismatch lists the values it could not
        # convert): only the kind of error is passed on.
        raise InvalidInput(f"the workers could not read the source ({type(exc).__name__}): every feature column "
                           "must hold numbers and every line the header's number of fields", field="source") from exc
    # Blocks of at most MAX_BLOCK_ROWS rows (a large file is sliced), so every worker gets a share; empty
    # partitions are left out.
    workers = len(client.scheduler_info().get("workers", {}))
    # Two blocks per worker at least (when the data allows MIN_BLOCK_ROWS each), so every worker gets a share.
    block_rows = max(MIN_BLOCK_ROWS, min(MAX_BLOCK_ROWS, math.ceil(sum(lengths) / max(2 * workers, 1))))
    pieces, piece_lengths = [], []
    for block, rows in zip(blocks, lengths):
        bounds = np.linspace(0, rows, max(1, math.ceil(rows / block_rows)) + 1).astype(int)
        for start, stop in zip(bounds[:-1], bounds[1:]):
            if stop > start:
                pieces.append(block if bounds.size == 2 else dask.delayed(_rows, pure=True)(block, start, stop))
                piece_lengths.append(int(stop - start))
    blocks = _persist(client, hook, pieces, held)
    lengths = piece_lengths
    offsets = np.concatenate([[0], np.cumsum(lengths)])[:-1].astype(int)
    wheres = [Where(i, int(offsets[i])) for i in range(len(blocks))]
    cluster = _Cluster(client, hook, blocks, wheres)
    n = int(sum(lengths))
    p = len(features)

    # ---- column statistics and checks
    progress("statistics", STAGES["statistics"])
    moments = cluster.reduce(ops.column_moments)
    observed, sums = moments["observed"], moments["sum"]
    means = np.where(observed > 0, sums / np.maximum(observed, 1), np.nan)
    deviations = cluster.reduce(ops.squared_deviations, np.nan_to_num(means))
    stats = {
        "observed": observed, "infinite": moments["infinite"], "min": moments["min"], "max": moments["max"],
        "abs_max": moments["abs_max"], "std": np.sqrt(deviations / np.maximum(observed, 1)),
    }
    keep, dropped = _column_checks(stats, features, config, named)
    config = dataclasses.replace(config, features=[features[j] for j in keep],
                                 dropped_features=config.dropped_features + dropped)
    probes = moments["probe"]          # per column its DISTINCT_PROBE smallest distinct values
    if len(keep) < p:
        # Refit on the kept columns. Their statistics are the ones above, taken per column: kept, not recomputed.
        narrower = _persist(client, hook, [dask.delayed(_columns, pure=True)(b, keep) for b in blocks], held)
        wide = held[:len(blocks)]
        del held[:len(blocks)]
        hook._release(wide)
        del wide                        # the full-width copies can go (lineage keeps them recomputable)
        blocks = narrower
        cluster = _Cluster(client, hook, blocks, wheres)
        observed, sums = observed[keep], sums[keep]
        means, stats = means[keep], {key: value[keep] for key, value in stats.items()}
        probes = [probes[j] for j in keep]
    features = list(config.features)
    p = len(features)
    _config_checks(config, n, p)
    data_digest = _chunked_digest(cluster, lengths, n, p)

    # ---- medians, scaling
    median_of = cluster.medians(ops.observed_by_feature, {j: int(observed[j]) for j in range(p)})
    medians = np.array([median_of[j] for j in range(p)])
    imputed_mean = cluster.reduce(ops.imputed_moments, medians, None)["sum"] / n
    imputed = cluster.reduce(ops.imputed_moments, medians, imputed_mean)
    imputed_var = imputed["ss"] / n
    imputed_min, imputed_max = imputed["min"], imputed["max"]
    imputer = _fitted_like(SimpleImputer(strategy="median"), p, statistics_=medians.copy())
    robust_stats = None
    if config.scaling == "standard":
        scaler = _fitted_like(StandardScaler(), p, mean_=imputed_mean, var_=imputed_var,
                              scale_=_zero_safe(np.sqrt(imputed_var)), n_samples_seen_=n)
    elif config.scaling == "minmax":
        data_range = imputed_max - imputed_min
        scale = 1.0 / _zero_safe(data_range)
        scaler = _fitted_like(MinMaxScaler(), p, data_min_=imputed_min, data_max_=imputed_max,
                              data_range_=data_range, scale_=scale, min_=-imputed_min * scale, n_samples_seen_=n)
    elif config.scaling == "robust":
        quartiles = ops.linear_quantiles(cluster.reduce, partial(ops.imputed_by_feature, medians=medians),
                                         {j: n for j in range(p)}, {j: np.array([0.25, 0.5, 0.75]) for j in range(p)})
        robust_stats = np.array([quartiles[j] for j in range(p)])
        scaler = _fitted_like(RobustScaler(), p, center_=robust_stats[:, 1],
                              scale_=_zero_safe(robust_stats[:, 2] - robust_stats[:, 0]))
    else:
        scaler = None
    centre, scale, after = elementwise_scaling(scaler, p)
    steps = Steps(medians=medians, centre=centre, scale=np.asarray(scale, dtype=float), after=after)
    scaled_mean = (imputed_mean - centre) * steps.scale + after
    scaled_var = imputed_var * steps.scale ** 2

    # ---- PCA: tall-skinny QR, then the SVD of R
    progress("pca", STAGES["pca"])
    pca = None
    eigenvalues = scaled_var * n / (n - 1)
    if config.components is not None:
        columns = [da.from_delayed(dask.delayed(ops.scaled_centred, pure=True)(b, steps, scaled_mean),
                                   shape=(m, p), dtype=np.float64) for b, m in zip(blocks, lengths)]
        matrix = da.concatenate(columns, axis=0)
        _, singular, vt = da.linalg.svd(matrix)
        singular, vt = cluster.compute(singular, vt)
        _, vt = svd_flip(None, vt, u_based_decision=False)
        eigenvalues = singular ** 2 / (n - 1)
        ratio = eigenvalues / eigenvalues.sum()
        if isinstance(config.components, float):
            d = int(np.searchsorted(np.cumsum(ratio), config.components, side="right") + 1)
            d = min(d, p)
        else:
            d = int(config.components)
        pca = _fitted_like(PCA(n_components=config.components, svd_solver="full", random_state=config.seed), p,
                           mean_=scaled_mean.copy(), components_=np.ascontiguousarray(vt[:d]), n_components_=d,
                           explained_variance_=eigenvalues[:d].copy(), explained_variance_ratio_=ratio[:d].copy(),
                           singular_values_=singular[:d].copy(), n_samples_=n,
                           noise_variance_=float(eigenvalues[d:].mean()) if d < min(n, p) else 0.0)
        steps = dataclasses.replace(steps, pca_mean=scaled_mean.copy(), axes=np.ascontiguousarray(vt[:d]))
        space_var = eigenvalues[:d] * (n - 1) / n
    else:
        space_var = scaled_var

    # ---- k-means|| candidates, local re-clustering per k, joint Lloyd
    progress("kmeans", STAGES["kmeans"])
    ks = list(range(config.k_min, config.k_max + 1))
    centres = _kmeans_all_k(cluster, steps, config, ks, n, float(np.mean(space_var)) * TOL, progress)
    finals = cluster.reduce(ops.lloyd_step, steps, [centres[k] for k in ks])
    curve, sizes_by_k = [], {}
    for i, k in enumerate(ks):
        inertia = float(finals[i][2])
        sizes_by_k[k] = finals[i][1]
        curve.append({"k": k, "distortion": inertia / n, "inertia": inertia, "silhouette": None})

    # ---- silhouette on a seeded sample, choice of k
    progress("selection", STAGES["selection"])
    sample_size = min(n, config.silhouette_sample)
    sample_rows = np.sort(np.random.default_rng(config.seed).choice(n, size=sample_size, replace=False))
    sample_space, _ = steps.space(cluster.rows(sample_rows))
    # scikit-learn computes the sample's pairwise distances in chunks of ``working_memory`` MiB (1 GiB by
    # default): a smaller chunk keeps this process's peak low at the same result.
    with sklearn.config_context(working_memory=SILHOUETTE_WORKING_MIB):
        for row in curve:
            labels = ops.sq_distances(sample_space, centres[row["k"]]).argmin(axis=1)
            if 2 <= np.unique(labels).size <= sample_space.shape[0] - 1:
                row["silhouette"] = float(silhouette_score(sample_space, labels))
    chosen, method = choose_k(curve, config)
    centroids = centres[chosen]
    k = chosen
    sizes = np.asarray(sizes_by_k[chosen], dtype=np.int64)
    inertia = next(row["inertia"] for row in curve if row["k"] == chosen)
    clusterer = _fitted_kmeans(centroids, inertia, config)

    has_residual = pca is not None and pca.n_components_ < p
    residual_limit = (jackson_mudholkar_limit(eigenvalues[pca.n_components_:], config.outlier_quantile)
                      if has_residual else 0.0)
    back = centroids if pca is None else pca.inverse_transform(centroids)
    raw_centroids = back if scaler is None else scaler.inverse_transform(back)

    # ---- held-out thresholds
    progress("calibration", STAGES["calibration"])
    calibration = _calibrate(cluster, steps, centroids, raw_centroids, sizes, config, n, p, has_residual,
                             None if pca is None else int(pca.n_components_), robust_stats, imputed_mean)

    # ---- profiles
    progress("profiles", STAGES["profiles"])
    segments = _profiles(cluster, steps, centroids, raw_centroids, sizes, calibration, config, means, stats["std"])

    # ---- drift reference
    progress("reference", STAGES["reference"])
    reference_rows = np.sort(np.random.default_rng(config.seed).choice(n, size=min(n, config.reference_sample),
                                                                        replace=False))
    kinds, edges = [], []
    decile_groups = {j: int(observed[j]) for j in range(p) if probes[j].size > MAX_CATEGORIES}
    deciles = ops.linear_quantiles(cluster.reduce, ops.observed_by_feature, decile_groups,
                                   {j: DECILES for j in decile_groups})
    for j in range(p):
        if j in decile_groups:
            kinds.append("quantiles")
            edges.append(np.unique(deciles[j]))
        else:
            kinds.append("categories")
            edges.append(probes[j])
    counts = cluster.reduce(ops.bin_counts, kinds, edges)
    residual_sample = (cluster.reduce(ops.gather_values, calibration["producer"], reference_rows, k)
                       if has_residual else np.zeros(reference_rows.size))
    reference = ReferenceProfile(
        n_records=n, bin_kinds=kinds, bin_edges=edges,
        bin_counts=list(counts),
        means=means.copy(), stds=stats["std"].copy(), missing_share=(n - observed) / n,
        missing_count=(n - observed).astype(np.int64), sample=cluster.rows(reference_rows),
        segment_counts=sizes.copy(), outlier_count=int(calibration["flagged"].sum()),
        outlier_rate=float(calibration["flagged"].sum() / n), residual_sample=residual_sample,
        residual_median=calibration["residual_median"])

    report = fit_report(
        config, n_records=n, pca=pca, imputer=imputer, curve=curve, chosen=chosen, method=method, inertia=inertia,
        segments=segments, centroid_agreement=1.0, residual_threshold=calibration["pooled_residual_threshold"],
        residual_limit=residual_limit, reference=reference, calibration=calibration["report"],
        data_sha256=data_digest, warnings=fit_warnings_from_counts(config, sizes, sizes, k, n), engine=ENGINE,
        engine_details={"workers": workers, "partitions": len(blocks), "source_format": source.format,
                        "data_sha256": f"chunked: SHA-256 of the SHA-256s of {DIGEST_CHUNK_ROWS}-row chunks "
                                       "(float64, C order), in order; not the whole-matrix digest of the "
                                       "other engines",
                        "kmeans_init": f"k-means|| ({KMEANS_PARALLEL_ROUNDS}+ rounds, oversampling 2 k_max)"})
    return Bundle(
        features=features, config=config, imputer=imputer, scaler=scaler, pca=pca, clusterer=clusterer,
        centroids=np.ascontiguousarray(centroids, dtype=np.float64),
        distance_thresholds=calibration["distance_thresholds"], residual_thresholds=calibration["residual_thresholds"],
        residual_threshold=calibration["pooled_residual_threshold"], residual_limit_jm=residual_limit,
        reference=reference, report=report)


def _chunked_digest(cluster: _Cluster, lengths: list[int], n: int, p: int, chunk_rows: int = DIGEST_CHUNK_ROWS
                    ) -> str:
    """``service.core.fit.data_chunks_sha256`` of the blocks' rows, computed where they lie: a chunk inside one
    block is hashed on its worker; one that spans blocks gets their pieces (at most a chunk's rows) moved between
    workers, never to this process."""
    import dask

    starts = np.concatenate([[0], np.cumsum(lengths)]).astype(int)
    digest_of = dask.delayed(chunk_digest, pure=True)
    slice_of = dask.delayed(_rows, pure=True)
    tasks = []
    for first in range(0, n, chunk_rows):
        last = min(first + chunk_rows, n)
        pieces = []
        for i in range(int(np.searchsorted(starts, first, side="right")) - 1, len(lengths)):
            if starts[i] >= last:
                break
            low, high = max(first, starts[i]) - starts[i], min(last, starts[i + 1]) - starts[i]
            if high > low:
                whole = low == 0 and high == lengths[i]
                pieces.append(cluster.blocks[i] if whole else slice_of(cluster.blocks[i], int(low), int(high)))
        tasks.append(digest_of(*pieces))
    # The chunks' digests are put together on a worker too: this process receives the one digest string.
    return cluster.compute(dask.delayed(combine_chunk_digests, pure=True)(n, p, tasks, chunk_rows))[0]


def _columns(block: np.ndarray, keep: list[int]) -> np.ndarray:
    return np.ascontiguousarray(block[:, keep])


def _kmeans_all_k(cluster: _Cluster, steps: Steps, config: FitConfig, ks: list[int], n: int, tolerance: float,
                  progress: Progress) -> dict[int, np.ndarray]:
    """Final centroids for every k: k-means|| candidates, local weighted k-means++ per k, joint Lloyd passes."""
    rng = np.random.default_rng(config.seed)
    first = cluster.rows(np.array([int(rng.integers(n))]))
    candidates, _ = steps.space(first)
    oversampling = 2.0 * max(ks)
    for round_ in range(KMEANS_PARALLEL_MAX_ROUNDS):
        phi = float(cluster.reduce(ops.candidate_cost, steps, candidates))
        distinct = np.unique(candidates, axis=0).shape[0]
        if phi == 0.0:
            if distinct < max(ks):
                raise InvalidInput(f"k (max {max(ks)}) exceeds the {distinct} distinct records (after imputing "
                                   "missing values with the medians); a segment needs a point of its own", field="k")
            break
        if round_ >= KMEANS_PARALLEL_ROUNDS and distinct >= max(ks):
            break
        drawn = cluster.reduce(ops.candidate_draw, steps, candidates, phi, oversampling, config.seed, round_)
        candidates = np.concatenate([candidates, drawn], axis=0)
    candidates = np.unique(candidates, axis=0)
    if candidates.shape[0] < max(ks):
        raise InvalidInput(f"k (max {max(ks)}) exceeds the distinct records the k-means|| draw found "
                           f"({candidates.shape[0]}); choose a smaller k", field="k")
    weights = cluster.reduce(ops.candidate_weights, steps, candidates).astype(float)
    centres = {}
    for k in ks:
        local = KMeans(n_clusters=k, n_init=config.n_init, random_state=config.seed)
        centres[k] = local.fit(candidates, sample_weight=weights).cluster_centers_
    active = list(ks)
    for iteration in range(MAX_ITER):
        if not active:
            break
        sums = cluster.reduce(ops.lloyd_step, steps, [centres[k] for k in active])
        still = []
        for i, k in enumerate(active):
            member_sum, member_rows = sums[i][0], sums[i][1]
            updated = np.where(member_rows[:, None] > 0, member_sum / np.maximum(member_rows, 1)[:, None], centres[k])
            shift = float(((updated - centres[k]) ** 2).sum())
            centres[k] = updated
            if shift > tolerance:
                still.append(k)
        active = still
        progress("kmeans", STAGES["kmeans"] + (STAGES["selection"] - STAGES["kmeans"]) * min(1.0, (iteration + 1) / 50))
    return centres


def _fold_models(total: dict[str, np.ndarray], steps: Steps, config: FitConfig, raw_centroids: np.ndarray,
                 n_components: int | None, shift: np.ndarray, k: int, p: int) -> tuple[list[Steps], list[np.ndarray]]:
    """Each fold's steps and starting centroids, fitted on the other folds from their sufficient statistics
    (``fold_statistics`` of all blocks)."""
    minima, maxima = total["min"], total["max"]
    fold_steps, fold_centroids = [], []
    for f in range(N_FOLDS):
        rows = total["rows"].sum() - total["rows"][f]
        mean_shifted = (total["sum"].sum(axis=0) - total["sum"][f]) / rows
        cross = (total["cross"].sum(axis=0) - total["cross"][f]) / rows
        covariance = cross - np.outer(mean_shifted, mean_shifted)
        mean = shift + mean_shifted
        if config.scaling == "standard":
            centre, scale, after = mean, 1.0 / _zero_safe(np.sqrt(np.clip(np.diag(covariance), 0, None))), np.zeros(p)
        elif config.scaling == "minmax":
            low = np.min(np.delete(minima, f, axis=0), axis=0)
            high = np.max(np.delete(maxima, f, axis=0), axis=0)
            centre, scale, after = low, 1.0 / _zero_safe(high - low), np.zeros(p)
        else:
            centre, scale, after = steps.centre, steps.scale, steps.after
        own = Steps(medians=steps.medians, centre=centre, scale=scale, after=after)
        if n_components is not None:
            scaled_cov = covariance * np.outer(scale, scale)
            values, vectors = np.linalg.eigh(scaled_cov)
            axes = vectors[:, ::-1][:, :min(n_components, p)].T
            own = dataclasses.replace(own, pca_mean=(mean - centre) * scale + after, axes=np.ascontiguousarray(axes))
        member_rows = total["member_rows"].sum(axis=0) - total["member_rows"][f]
        member_sum = total["member_sum"].sum(axis=0) - total["member_sum"][f]
        start_raw = np.where(member_rows[:, None] > 0, member_sum / np.maximum(member_rows, 1)[:, None], raw_centroids)
        start, _ = own.space(start_raw)
        fold_steps.append(own)
        fold_centroids.append(start)
    return fold_steps, fold_centroids


def _segment_scales(cluster: _Cluster, producer: Callable, counts: np.ndarray, k: int, offsets: tuple[int, ...]
                    ) -> list[np.ndarray]:
    """(N_FOLDS, k) ``segment_medians`` of each fold's in-sample scores, per offset (groups laid out by
    ``fold_in_sample_scores``: offset 0 for distances, k + 1 for residuals), in one selection."""
    groups = {}
    for offset in offsets:
        for f in range(N_FOLDS):
            base = f * 2 * (k + 1) + offset
            groups[base + k] = int(counts[f].sum())
            for c in range(k):
                if counts[f, c] >= MIN_MEDIAN_ROWS:
                    groups[base + c] = int(counts[f, c])
    found = cluster.medians(producer, groups)
    return [_scales_at(found, k, offset) for offset in offsets]


def _scales_at(found: dict[int, float], k: int, offset: int) -> np.ndarray:
    out = np.empty((N_FOLDS, k))
    for f in range(N_FOLDS):
        base = f * 2 * (k + 1) + offset
        overall = found[base + k]
        # segment_medians falls back to the median of the positive scores when the overall one is 0; a fold
        # where over half the rows sit exactly on their centroid is degenerate, and 1.0 keeps scores finite.
        overall = overall if overall > 0 else 1.0
        for c in range(k):
            own = found.get(base + c, math.nan)
            out[f, c] = own if (base + c in found and own > 0) else overall
    return out


def _calibrate(cluster: _Cluster, steps: Steps, centroids: np.ndarray, raw_centroids: np.ndarray, sizes: np.ndarray,
               config: FitConfig, n: int, p: int, has_residual: bool, n_components: int | None,
               robust_stats: np.ndarray | None, imputed_mean: np.ndarray) -> dict[str, Any]:
    """Held-out thresholds (see ``service.core.calibration`` and this module's docstring)."""
    k, q, seed = centroids.shape[0], config.outlier_quantile, config.seed
    statistics = cluster.reduce(ops.fold_statistics, steps.medians, imputed_mean, steps, centroids, seed)
    fold_steps, fold_centroids = _fold_models(statistics, steps, config, raw_centroids, n_components, imputed_mean,
                                              k, p)
    fold_rows = statistics["rows"]
    if k > 1:
        active = [f for f in range(N_FOLDS) if fold_rows.sum() - fold_rows[f] >= k]
        for _ in range(MAX_ITER):
            if not active:
                break
            sums = cluster.reduce(ops.fold_lloyd_step, fold_steps, fold_centroids, seed)
            still = []
            for f in active:
                member_sum, member_rows = sums[f][0], sums[f][1]
                updated = np.where(member_rows[:, None] > 0, member_sum / np.maximum(member_rows, 1)[:, None],
                                   fold_centroids[f])
                shift = float(((updated - fold_centroids[f]) ** 2).sum())
                fold_centroids[f] = updated
                # scikit-learn's tolerance: TOL x the mean variance of the fold's space (its PCA eigenvalues,
                # or the scaled columns' variances: 1 per column for standard scaling, a fair bound otherwise).
                if shift > TOL * _space_variance(fold_steps[f], statistics, f, p):
                    still.append(f)
            active = still
    member_rows = statistics["member_rows"]                                               # (folds, k) held in fold
    train_rows = member_rows.sum(axis=0) - member_rows                                    # (folds, k) training part
    in_sample = partial(ops.fold_in_sample_scores, final=steps, centroids=centroids, fold_steps=fold_steps,
                        fold_centroids=fold_centroids, seed=seed)
    scales = _segment_scales(cluster, in_sample, train_rows, k, (0, k + 1) if has_residual else (0,))
    d_scale, r_scale = scales[0], (scales[1] if has_residual else None)
    held = partial(ops.held_out_scores, final=steps, centroids=centroids, fold_steps=fold_steps,
                   fold_centroids=fold_centroids, d_scale=d_scale, r_scale=r_scale, seed=seed)
    own_rows = min_own_rows(q)
    borrowed = sizes < own_rows

    def conformal_rank(count: int) -> int:         # 0-based ceil((n + 1) q)-th smallest, capped at n
        return min(int(math.ceil((count + 1) * q - 1e-9)), count) - 1

    def loo_rank(count: int) -> int:               # 0-based rank of the leave-one-out threshold
        return min(int(math.ceil(count * q - 1e-9)), count - 1) - 1

    queries = [(k + 1, conformal_rank(n)), (k + 1, loo_rank(n))]
    for c in range(k):
        if not borrowed[c] and sizes[c] >= 2:
            queries += [(c, conformal_rank(int(sizes[c]))), (c, loo_rank(int(sizes[c])))]
    if has_residual:
        # The pooled conformal quantile, then np.median's two middle order statistics, of held-out residuals.
        queries += [(k, conformal_rank(n)), (k, (n - 1) // 2), (k, n // 2)]
    picked = cluster.select(held, queries)
    pooled, pooled_loo = picked[0], picked[1]
    multipliers = np.full(k, pooled)
    limits = np.full(k, pooled_loo)
    at = 2
    for c in range(k):
        if not borrowed[c] and sizes[c] >= 2:
            multipliers[c], limits[c] = picked[at], picked[at + 1]
            at += 2
    pooled_residual = float(picked[at]) if has_residual else 0.0
    residual_median = float((picked[at + 1] + picked[at + 2]) / 2) if has_residual else 0.0
    flagged = np.asarray(cluster.reduce(ops.scores_above, held, np.arange(k), limits), dtype=np.int64)

    final_groups = {2 * k: n, 2 * k + 1: n}
    for c in range(k):
        if sizes[c] >= MIN_MEDIAN_ROWS:
            final_groups[c] = int(sizes[c])
            final_groups[k + c] = int(sizes[c])
    final = cluster.medians(partial(_final_scores_pooled, steps=steps, centroids=centroids), final_groups)
    final_d = _with_fallback(final, k, 0, 2 * k)
    final_r = _with_fallback(final, k, k, 2 * k + 1) if has_residual else np.zeros(k)
    flag_rate = float(flagged.sum() / n)
    return {
        "distance_thresholds": multipliers * final_d,
        "residual_thresholds": multipliers * final_r,
        "multipliers": multipliers,
        "borrowed": borrowed,
        "flagged": flagged,
        "pooled_residual_threshold": pooled_residual,
        "residual_median": float(residual_median),
        "producer": held,
        "report": {
            "method": "cross-fitted split-conformal",
            "folds": N_FOLDS,
            "score": "max(distance / segment median distance, residual / segment median residual)",
            "nominal_rate": 1.0 - q,
            "own_threshold_min_rows": own_rows,
            "held_out_flag_rate": flag_rate,
            "held_out_flag_count": int(flagged.sum()),
            "held_out_rows": n,
            "engine_notes": ("Dask engine: folds drawn per row from a seeded generator at the row's index (not "
                             "stratified by segment); each fold's scaler and PCA from the other folds' sums and cross products; imputation "
                             "medians" + (" and robust scaling" if robust_stats is not None else "") +
                             " from all rows; order statistics exact"),
        },
    }


def _space_variance(steps: Steps, statistics: dict[str, np.ndarray], f: int, p: int) -> float:
    rows, sums, cross = statistics["rows"], statistics["sum"], statistics["cross"]
    count = rows.sum() - rows[f]
    mean = (sums.sum(axis=0) - sums[f]) / count
    covariance = (cross.sum(axis=0) - cross[f]) / count - np.outer(mean, mean)
    covariance = covariance * np.outer(steps.scale, steps.scale)
    if steps.axes is not None:
        covariance = steps.axes @ covariance @ steps.axes.T
    return float(np.mean(np.diag(covariance)))


def _final_scores_pooled(block: np.ndarray, where: Where, steps: Steps, centroids: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray]:
    """``final_scores`` plus the pooled groups 2k (all distances) and 2k + 1 (all residuals)."""
    values, groups = ops.final_scores(block, where, steps, centroids)
    k = centroids.shape[0]
    return np.concatenate([values, values]), np.concatenate([groups, np.where(groups < k, 2 * k, 2 * k + 1)])


def _with_fallback(found: dict[int, float], k: int, offset: int, overall_group: int) -> np.ndarray:
    """``segment_medians``: a segment's own median when it has enough rows and it is positive, else overall."""
    overall = found[overall_group] if found[overall_group] > 0 else 1.0
    return np.array([found[offset + c] if (offset + c in found and found[offset + c] > 0) else overall
                     for c in range(k)])


def _profiles(cluster: _Cluster, steps: Steps, centroids: np.ndarray, raw_centroids: np.ndarray, sizes: np.ndarray,
              calibration: dict[str, Any], config: FitConfig, overall_mean: np.ndarray, overall_std: np.ndarray
              ) -> list[dict[str, Any]]:
    """The report's segments, as ``service.core.fit._describe_segments`` (labels = the assign rule here)."""
    k, p = centroids.shape[0], len(config.features)
    first = cluster.reduce(ops.segment_moments, steps, centroids, None)
    observed = first["observed"]
    means = np.where(observed > 0, first["sum"] / np.maximum(observed, 1), np.nan)
    second = cluster.reduce(ops.segment_moments, steps, centroids, np.nan_to_num(means))
    stds = np.where(observed > 0, np.sqrt(second["sum"] / np.maximum(observed, 1)), np.nan)
    medians = cluster.medians(partial(ops.observed_by_segment_feature, steps=steps, centroids=centroids),
                              {c * p + j: int(observed[c, j]) for c in range(k) for j in range(p)})
    n = int(sizes.sum())
    segments = []
    for c in range(k):
        profile = {}
        for j, name in enumerate(config.features):
            profile[name] = {"mean": _finite(means[c, j]), "median": _finite(medians[c * p + j]),
                             "std": _finite(stds[c, j]),
                             "z": _finite((means[c, j] - overall_mean[j]) / overall_std[j])}
        segments.append({
            "id": c, "label": None, "size": int(sizes[c]), "share": float(sizes[c] / n),
            "clusterer_size": int(sizes[c]),
            "distance_threshold": float(calibration["distance_thresholds"][c]),
            "residual_threshold": float(calibration["residual_thresholds"][c]),
            "threshold_source": "pooled" if calibration["borrowed"][c] else "own",
            "held_out_flag_rate": float(calibration["flagged"][c] / sizes[c]) if sizes[c] else 0.0,
            "centroid": {name: float(raw_centroids[c, j]) for j, name in enumerate(config.features)},
            "profile": profile,
        })
    return segments


def _finite(value: float) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


# --------------------------------------------------------------------------- running a fit from the service
def run_dask_fit(values: np.ndarray | None, config: FitConfig, *, source: DataSource | None, settings: Any,
                 progress: Progress | None = None, cancel: CancelHook | None = None) -> Bundle:
    """A fit on the cluster at ``settings.dask_scheduler``: connect, spill uploaded ``values`` to Parquet under
    ``settings.dask_spill_dir`` (when no ``source``), fit, clean up. Blocks: call it from a thread.

    The fit is cancelled after ``settings.fit_time_limit_seconds`` (``FitTimeLimit``). The caller saves the
    bundle; a failure here has written no version.
    """
    from distributed import Client

    from service.engines.sources import spill_records
    from service.errors import FitTimeLimit

    hook = cancel or CancelHook()
    address = settings.dask_scheduler
    if not address:
        raise InvalidInput("engine 'dask' needs a Dask scheduler; the server has none (setting "
                           "SEGSCORE_DASK_SCHEDULER)", field="engine")
    if source is None:
        spill_dir = settings.dask_spill_dir or (settings.store_dir / "dask-spill")
        source = spill_records(values, list(config.features), spill_dir)
    timed_out = threading.Event()

    def stop_at_limit() -> None:
        timed_out.set()
        hook.cancel()

    timer = threading.Timer(settings.fit_time_limit_seconds, stop_at_limit)
    timer.daemon = True
    try:
        try:
            client = Client(address, timeout="10s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ClusterUnavailable(address, f"cannot be reached ({type(exc).__name__})") from exc
        timer.start()
        try:
            return fit_on_dask(source, config, client=client, progress=progress, cancel=hook)
        except FitCancelled:
            if timed_out.is_set():
                raise FitTimeLimit(settings.fit_time_limit_seconds) from None
            raise
        finally:
            timer.cancel()
            try:
                client.close(timeout=10)
            except Exception:  # noqa: BLE001 - a lost scheduler: nothing left to close
                pass
    finally:
        if source.spilled is not None:
            import shutil

            shutil.rmtree(source.spilled, ignore_errors=True)
