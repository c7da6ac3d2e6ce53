"""Fit-input preparation: a fit body (JSON records, or CSV with parameters in a query) -> the checked training
matrix and the fit config. Shared by the fit route and ``segscore fit`` so both apply the same limits and checks."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
import pandas as pd

from schemas import FitRequest
from service.core.bundle import FitConfig
from service.core.fit import unusable_features
from service.core.frame import (
    batch_from_frame,
    batch_from_json,
    did_you_mean,
    json_columns,
    numeric_csv_columns,
    pairs_one_edit_apart,
    read_csv,
)
from service.engines import resolve_engine
from service.engines.sources import DataSource, check_source
from service.errors import InvalidInput, PayloadTooLarge, RecordProblem
from service.inputs.checks import (
    check_json_rows,
    parse_json,
    printable,
    records_of,
    unknown_query_problem,
    validate_model,
)

QUERY_PARAMETERS = frozenset(set(FitRequest.model_fields) - {"records"})
FIT_BODY_KEYS = frozenset(FitRequest.model_fields)


def _query_parameters(query: Mapping[str, str]) -> dict[str, Any]:
    """The fit parameters of a CSV request, from the query string, in the JSON request's shape."""
    unknown = sorted(set(query) - QUERY_PARAMETERS)
    if unknown:
        # The CSV twin of the JSON body's "extra fields are not permitted": a misspelt option must not be
        # silently replaced by its default.
        raise InvalidInput([unknown_query_problem(key, QUERY_PARAMETERS) for key in unknown])
    params: dict[str, Any] = {}
    for key in ("id_column", "scaling", "method", "linkage", "selection", "engine", "source"):
        if key in query:
            params[key] = query[key]
    if "features" in query:
        params["features"] = [f.strip() for f in query["features"].split(",") if f.strip()]
    for key in ("n_init", "seed"):
        if key in query:
            params[key] = query[key]
    if "outlier_quantile" in query:
        params["outlier_quantile"] = query["outlier_quantile"]
    if "engine" in query:
        params["engine"] = query["engine"]
    if "make_live" in query:
        params["make_live"] = query["make_live"]
    if "components" in query:
        raw = query["components"].strip().lower()
        if raw in ("none", "null", ""):
            params["components"] = None
        else:
            try:
                params["components"] = int(raw) if raw.lstrip("-").isdigit() else float(raw)
            except ValueError:
                raise InvalidInput(f"expected an int, a float in (0, 1) or 'none'; got {raw!r}",
                                   field="components") from None
    if "k" in query:
        raw = query["k"].strip()
        low, sep, high = raw.partition("-")
        try:
            params["k"] = {"min": int(low), "max": int(high)} if sep else int(raw)
        except ValueError:
            raise InvalidInput(f"expected an int or a range like 2-10; got {raw!r}", field="k") from None
    return params


def usable_columns(features: list[str], unusable: dict[str, str]) -> list[int]:
    """The positions of the default features worth keeping; none at all is a refusal naming every reason."""
    keep = [j for j, f in enumerate(features) if f not in unusable]
    if not keep:
        raise InvalidInput([RecordProblem(None, f, f"feature cannot be used: {why}") for f, why in unusable.items()])
    return keep


def _fit_config(request_model: FitRequest, features: list[str], settings,
                dropped: tuple[tuple[str, str], ...] = ()) -> FitConfig:
    k = request_model.k
    fixed = isinstance(k, int)
    top = k if fixed else k.max
    if top > settings.max_k:
        # Each k is a clustering fit whose cost grows with k; k = 5000 would hold up every other fit for minutes.
        raise InvalidInput(f"k (or the top of the k range) is {top}; at most {settings.max_k} "
                           "(setting SEGSCORE_MAX_K)", field="k")
    if not fixed and k.max - k.min + 1 > settings.max_k_candidates:
        # Every candidate k is a full clustering fit: an unbounded range would let one request run for hours.
        raise InvalidInput(f"the k range {k.min}-{k.max} has {k.max - k.min + 1} candidates; at most "
                           f"{settings.max_k_candidates} (setting SEGSCORE_MAX_K_CANDIDATES)", field="k")
    return FitConfig(
        features=features,
        id_column=request_model.id_column,
        scaling=request_model.scaling,
        components=request_model.components,
        method=request_model.method,
        linkage=request_model.linkage,
        k_min=k if fixed else k.min,
        k_max=k if fixed else k.max,
        k_fixed=fixed,
        selection=request_model.selection,
        n_init=request_model.n_init,
        seed=request_model.seed,
        outlier_quantile=request_model.outlier_quantile,
        silhouette_sample=settings.silhouette_sample,
        reference_sample=settings.reference_sample,
        make_live=request_model.make_live,
        dropped_features=dropped,
        engine=request_model.engine,
    )


def json_feature_candidates(records: list[Any], id_column: str | None) -> list[str]:
    """Default features of a JSON fit: every column that holds at least one number (booleans are not), or
    only nulls.

    A column that mixes numbers with other values stays a candidate, so its bad values are reported
    by record index instead of the whole column being dropped without a word.
    """
    candidates = []
    rows = [r for r in records if isinstance(r, dict)]
    for name in json_columns(records):
        if name == id_column:
            continue
        values = [r[name] for r in rows if name in r]
        # A column of nulls only is a candidate too: it is then dropped with a warning, never silently.
        if any(type(v) in (int, float) for v in values) or all(v is None for v in values):
            candidates.append(name)
    return candidates


def _refuse_split_columns(records: list[Any], columns: list[str]) -> None:
    """Two columns one edit apart that never appear in the same record are one column with a typo in some
    records (``tenure_month`` / ``tenure_months``): a 422 naming both, not two half-missing features."""
    close = pairs_one_edit_apart(columns)
    if not close:
        return
    rows = [r for r in records if isinstance(r, dict)]
    problems = []
    for a, b in close:
        if not any(a in r and b in r for r in rows):
            problems.append(RecordProblem(None, b, f"column {b!r} is one edit away from {a!r} and no record has "
                                          "both: a typo in some records? Use one name (or list 'features')"))
    if problems:
        raise InvalidInput(problems)


def csv_feature_candidates(frame: pd.DataFrame, id_column: str | None) -> list[str]:
    """Default features of a CSV fit: numeric columns, plus text columns in which some cells are numbers
    (so a stray bad cell is reported by row instead of the column silently disappearing)."""
    numeric = set(numeric_csv_columns(frame, id_column))
    candidates = []
    for name in frame.columns:
        if name == id_column:
            continue
        column = frame[name]
        if name in numeric or (
            not pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column)
            and pd.to_numeric(column, errors="coerce").notna().any()
        ):
            candidates.append(name)
    return candidates


def _resolve_features(requested: list[str] | None, available: list[str], numeric: list[str],
                      id_column: str | None) -> list[str]:
    if id_column is not None and id_column not in available:
        raise InvalidInput(f"id_column {id_column!r} is not a column of the records", field="id_column")
    if requested is None:
        if not numeric:
            raise InvalidInput("no numeric columns found; name the features explicitly", field="features")
        return numeric
    problems = []
    unknown = [f for f in requested if f not in available]
    if unknown:
        shown = ", ".join(sorted(available)[:30])
        hints = "".join(did_you_mean(f, available) for f in unknown[:5])
        problems.append(RecordProblem(None, "features", f"unknown column(s) {[printable(f) for f in unknown]}; "
                                      f"available: {shown}{hints}"))
    if id_column is not None and id_column in requested:
        problems.append(RecordProblem(None, "features", f"id_column {id_column!r} cannot also be a feature"))
    if len(set(requested)) != len(requested):
        problems.append(RecordProblem(None, "features", "features are listed more than once"))
    if problems:
        raise InvalidInput(problems)
    return list(requested)


def training_inputs(params: FitRequest, settings, *, frame: pd.DataFrame | None = None,
                    records: list[Any] | None = None) -> tuple[np.ndarray, FitConfig]:
    """The checked training matrix and the fit config, from a CSV frame or from JSON records (give one).

    Shared by the HTTP endpoint and ``segscore store-fit``, so both apply the same limits and checks."""
    if frame is not None:
        n_rows, available = len(frame), list(frame.columns)
        candidates = csv_feature_candidates(frame, params.id_column)
    else:
        n_rows, available = len(records), json_columns(records)
        candidates = json_feature_candidates(records, params.id_column)
    if n_rows > settings.max_fit_rows:
        raise PayloadTooLarge(f"{n_rows} records; the fit limit is {settings.max_fit_rows}")
    if n_rows == 0:
        raise InvalidInput("no records to fit", field="records")
    features = _resolve_features(params.features, available, candidates, params.id_column)
    if len(features) > settings.max_features:
        raise InvalidInput(f"{len(features)} features; at most {settings.max_features} per fit (setting "
                           "SEGSCORE_MAX_FEATURES); name the ones to use in 'features'", field="features")
    if frame is not None:
        batch = batch_from_frame(frame, features, params.id_column)
    else:
        if params.features is None:
            _refuse_split_columns(records, features)
        batch = batch_from_json(records, features, params.id_column)
    batch.raise_if_problems()
    values, dropped = batch.values, ()
    if params.features is None and n_rows >= 2:
        # Default features: columns with no information (all missing, constant or near-constant) are dropped
        # and listed in the report's warnings. Named features are checked (and refused) by the fit itself.
        unusable = unusable_features(values, features)
        if unusable:
            keep = usable_columns(features, unusable)
            dropped = tuple(unusable.items())
            features, values = [features[j] for j in keep], values[:, keep]
    return values, _fit_config(params, features, settings, dropped)


@dataclass(frozen=True)
class FitPlan:
    """A checked fit request: what to fit on, how, and on which engine."""

    values: np.ndarray | None      # the training matrix; None when the workers read ``source``
    config: FitConfig              # features empty: the source's numeric columns (the engine resolves them)
    make_live: bool | None
    engine: str                    # one of schemas.fit.FIT_ENGINES (``auto`` resolved)
    source: DataSource | None      # checked against SEGSCORE_SOURCE_PREFIXES


def prepare_fit_request(body: bytes, csv: bool, query: Mapping[str, str], settings) -> FitPlan:
    """A fit body (JSON with records or a ``source``, or CSV with parameters in the query) -> a FitPlan.

    A ``source`` is checked against SEGSCORE_SOURCE_PREFIXES first (403, nothing read)."""
    if not csv:
        check_json_rows(body, settings.max_fit_rows, allowance=settings.max_features + 2)
        document = parse_json(body)
        if isinstance(document, dict) and document.get("source") is not None:
            params = validate_model(FitRequest, document)
            if params.records:
                raise InvalidInput("send records or name a source, not both", field="source")
            source = check_source(params.source, settings.source_prefixes)
            engine = resolve_engine(params.engine, None, settings)
            features = list(params.features or [])
            if len(features) > settings.max_features:
                raise InvalidInput(f"{len(features)} features; at most {settings.max_features} per fit (setting "
                                   "SEGSCORE_MAX_FEATURES)", field="features")
            return FitPlan(None, _fit_config(params, features, settings), params.make_live, engine, source)
    elif query.get("source"):
        raise InvalidInput("a source is named in a JSON body (a CSV body carries the records)", field="source")
    values, config, make_live, requested = _prepare(body, csv, query, settings, None if csv else document)
    return FitPlan(values, config, make_live, resolve_engine(requested, values.shape[0], settings), None)


def prepare_fit(body: bytes, csv: bool, query: Mapping[str, str], settings) -> tuple[Any, FitConfig, bool | None]:
    """A fit body (JSON, or CSV with parameters in the query) -> (training matrix, config, make_live)."""
    values, config, make_live, _ = _prepare(body, csv, query, settings)
    return values, config, make_live


def _prepare(body: bytes, csv: bool, query: Mapping[str, str], settings, document: Any = None
             ) -> tuple[Any, FitConfig, bool | None, str]:
    if csv:
        params = validate_model(FitRequest, _query_parameters(query))
        frame = read_csv(body, params.id_column, max_rows=settings.max_fit_rows)
        values, config = training_inputs(params, settings, frame=frame)
    else:
        # Records are counted on the bytes first: a body of millions of tiny records never becomes objects.
        if document is None:
            check_json_rows(body, settings.max_fit_rows, allowance=settings.max_features + 2)
            document = parse_json(body)
        records = records_of(document, allowed_keys=FIT_BODY_KEYS)
        params = validate_model(FitRequest, {k: v for k, v in document.items() if k != "records"})
        values, config = training_inputs(params, settings, records=records)
    return values, config, params.make_live, params.engine


