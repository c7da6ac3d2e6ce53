"""Fit, list, read, promote and label segmentations."""

from __future__ import annotations

from typing import Any, Mapping

import anyio
import numpy as np
import pandas as pd
from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse

from schemas import FitReport, FitRequest, LabelUpdate, LiveUpdate, Segment, SegmentationDetail, SegmentationList
from service.api.payload import check_name, is_csv, parse_json, read_body, records_of, request_body_openapi
from service.api.validation import validate_model
from service.core.bundle import FitConfig
from service.core.frame import (
    batch_from_frame,
    batch_from_json,
    json_columns,
    numeric_csv_columns,
    read_csv,
)
from service.deps import FitScope, ReadScope, SettingsDep, StoreDep
from service.errors import InvalidInput, PayloadTooLarge, RecordProblem
from service.fitting import fit_in_worker

router = APIRouter(prefix="/segmentations", tags=["segmentations"])

FIT_BODY = request_body_openapi(FitRequest, "header row, then one row per record; parameters in the query "
                                "string (features=a,b&k=2-10&components=none)")


QUERY_PARAMETERS = frozenset(set(FitRequest.model_fields) - {"records"})


def _query_parameters(query: Mapping[str, str]) -> dict[str, Any]:
    """The fit parameters of a CSV request, from the query string, in the JSON request's shape."""
    unknown = sorted(set(query) - QUERY_PARAMETERS)
    if unknown:
        # The CSV twin of the JSON body's "extra fields are not permitted": a misspelt option must not be
        # silently replaced by its default.
        raise InvalidInput([RecordProblem(None, key, f"unknown query parameter; known: {sorted(QUERY_PARAMETERS)}")
                            for key in unknown])
    params: dict[str, Any] = {}
    for key in ("id_column", "scaling", "method", "linkage", "selection"):
        if key in query:
            params[key] = query[key]
    if "features" in query:
        params["features"] = [f.strip() for f in query["features"].split(",") if f.strip()]
    for key in ("n_init", "seed"):
        if key in query:
            params[key] = query[key]
    if "outlier_quantile" in query:
        params["outlier_quantile"] = query["outlier_quantile"]
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


def _fit_config(request_model: FitRequest, features: list[str], settings) -> FitConfig:
    k = request_model.k
    fixed = isinstance(k, int)
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
    )


def json_feature_candidates(records: list[Any], id_column: str | None) -> list[str]:
    """Default features of a JSON fit: every column that holds at least one number (booleans are not).

    A column that mixes numbers with other values stays a candidate, so its bad values are reported
    by record index instead of the whole column being dropped without a word.
    """
    candidates = []
    for name in json_columns(records):
        if name != id_column and any(type(r.get(name)) in (int, float) for r in records if isinstance(r, dict)):
            candidates.append(name)
    return candidates


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
        problems.append(RecordProblem(None, "features", f"unknown column(s) {unknown}; available: {shown}"))
    if id_column is not None and id_column in requested:
        problems.append(RecordProblem(None, "features", f"id_column {id_column!r} cannot also be a feature"))
    if len(set(requested)) != len(requested):
        problems.append(RecordProblem(None, "features", "features are listed more than once"))
    if problems:
        raise InvalidInput(problems)
    return list(requested)


@router.post("/{name}/fit", status_code=201, response_model=FitReport, openapi_extra=FIT_BODY,
             dependencies=[FitScope], summary="Fit a new version from records")
async def fit(name: str, request: Request, settings: SettingsDep, store: StoreDep) -> JSONResponse:
    check_name(name)
    body = await read_body(request, settings.max_body_bytes)
    # Parsing and checking a big body is CPU work too: like the fit, it runs off the event loop.
    values, config, make_live = await anyio.to_thread.run_sync(
        _prepare_fit, body, is_csv(request), request.query_params, settings)

    def fit_and_save() -> dict[str, Any]:
        # The fit runs in a worker process (service.fitting); the store is written here, by the server.
        bundle = fit_in_worker(values, config, max_agglomerative_rows=settings.max_agglomerative_rows,
                               time_limit=settings.fit_time_limit_seconds)
        return store.save_version(name, bundle, make_live=make_live)

    report = await anyio.to_thread.run_sync(fit_and_save, limiter=request.app.state.fit_limiter)
    request.app.state.metrics.fits.inc()
    return JSONResponse(report, status_code=201)


def training_inputs(params: FitRequest, settings, *, frame: pd.DataFrame | None = None,
                    records: list[Any] | None = None) -> tuple[np.ndarray, FitConfig]:
    """The checked training matrix and the fit config, from a CSV frame or from JSON records (give one).

    Shared by the HTTP endpoint and ``segscore fit``, so both apply the same limits and checks."""
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
    if frame is not None:
        batch = batch_from_frame(frame, features, params.id_column)
    else:
        batch = batch_from_json(records, features, params.id_column)
    batch.raise_if_problems()
    return batch.values, _fit_config(params, features, settings)


def _prepare_fit(body: bytes, csv: bool, query: Mapping[str, str], settings) -> tuple[Any, FitConfig, bool | None]:
    """A fit body (JSON, or CSV with parameters in the query) -> (training matrix, config, make_live)."""
    if csv:
        params = validate_model(FitRequest, _query_parameters(query))
        values, config = training_inputs(params, settings, frame=read_csv(body))
    else:
        document = parse_json(body)
        records = records_of(document)
        params = validate_model(FitRequest, {k: v for k, v in document.items() if k != "records"})
        values, config = training_inputs(params, settings, records=records)
    return values, config, params.make_live


@router.get("", response_model=SegmentationList, dependencies=[ReadScope], summary="List segmentations")
def list_segmentations(store: StoreDep) -> dict[str, Any]:
    return {"segmentations": store.list_segmentations()}


@router.get("/{name}", response_model=SegmentationDetail, dependencies=[ReadScope],
            summary="A segmentation with a summary row per version")
def get_segmentation(name: str, store: StoreDep) -> dict[str, Any]:
    return store.get_segmentation(check_name(name))


@router.get("/{name}/versions/{version}", response_model=FitReport, dependencies=[ReadScope],
            summary="The fit report of one version")
def get_version(name: str, version: int, store: StoreDep) -> dict[str, Any]:
    return store.version_report(check_name(name), version)


@router.put("/{name}/live", response_model=SegmentationDetail, dependencies=[FitScope],
            summary="Make a version live (promote or roll back)")
def set_live(name: str, update: LiveUpdate, store: StoreDep) -> dict[str, Any]:
    return store.set_live(check_name(name), update.version)


@router.patch("/{name}/versions/{version}/segments/{segment}", response_model=Segment, dependencies=[FitScope],
              summary="Label a segment (metadata only)")
def label_segment(name: str, version: int, segment: int, update: LabelUpdate, store: StoreDep) -> dict[str, Any]:
    return store.set_label(check_name(name), version, segment, update.label)
