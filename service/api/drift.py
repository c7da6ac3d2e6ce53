"""Drift reports: compare a batch with a version's training distribution, store the report, list them."""

from __future__ import annotations

import time
import uuid
from datetime import datetime, timezone
from typing import Annotated, Any, Literal

import anyio
import orjson
from fastapi import APIRouter, Query, Request
from fastapi.responses import Response
from pydantic import BeforeValidator

from schemas import DriftReport, DriftReportList
from schemas.assign import AssignRequest
from service.api import arrow_answers
from service.api.assign import run_assignment, split_good_rows
from service.api.payload import (
    ARROW_STREAM_TYPE,
    VARY_ACCEPT,
    check_name,
    read_version_batch,
    request_body_openapi,
    wants_arrow,
)
from service.api.validation import StrictQuery, VersionNumber, error_responses, plain_decimal
from service.core.drift import DriftRules, compute_drift
from service.core.frame import MAX_LISTED_PROBLEMS
from service.deps import DriftScope, SettingsDep, StoreDep
from service.errors import InvalidInput, LiveDriftOff, RecordProblem
from service.live.window import live_drift_report, parse_window
from service.settings import Settings
from service.store import BundleStore, LoadedVersion

router = APIRouter(prefix="/segmentations", tags=["drift"])

DEFAULT_LIST_LIMIT = 20
MAX_LIST_LIMIT = 500

DRIFT_BODY = request_body_openapi(AssignRequest, "header row, then one row per record", arrow=True,
                                  answer=DriftReport)


def drift_rules(settings: Settings) -> DriftRules:
    return DriftRules(
        alpha=settings.drift_alpha,
        psi_watch=settings.drift_psi_watch,
        psi_alert=settings.drift_psi_alert,
        outlier_ratio_watch=settings.drift_outlier_rate_watch_ratio,
        outlier_ratio_alert=settings.drift_outlier_rate_ratio,
        residual_ratio_watch=settings.drift_residual_median_watch_ratio,
        residual_ratio_alert=settings.drift_residual_median_ratio,
    )


def _now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def build_and_store(store: BundleStore, loaded: LoadedVersion, values, rules: DriftRules,
                    errors: list[dict[str, Any]], rows=None) -> dict[str, Any]:
    """Assign (fast path), compute the report, check it against the schema, store it. CPU-bound: run in a thread."""
    assignment, _ = run_assignment(loaded, values, rows)     # rows: input indices, for error items
    body = compute_drift(loaded.bundle.reference, loaded.bundle.features, values, assignment, rules=rules,
                         residual_available=loaded.compiled.has_residual,
                         labels=store.labels(loaded.name, loaded.version))
    report = {"id": uuid.uuid4().hex, "name": loaded.name, "version": loaded.version, "created_at": _now(),
              **body, "skipped_records": len({e["record"] for e in errors}), "errors": errors[:MAX_LISTED_PROBLEMS]}
    # A report that breaks the contract (e.g. a NaN) fails here, before anything is stored.
    DriftReport.model_validate(report)
    store.save_drift_report(report)
    return report


@router.post("/{name}/drift", response_model=DriftReport, openapi_extra=DRIFT_BODY, dependencies=[DriftScope, StrictQuery],
             summary="Compare a batch with the training distribution; the report is stored",
             responses=error_responses(400, 401, 403, 404, 409, 413, 415, 422, 500, 503))
async def create_drift_report(
    name: str,
    request: Request,
    settings: SettingsDep,
    store: StoreDep,
    version: Annotated[VersionNumber | None, Query(description="default: the live version")] = None,
    on_error: Annotated[Literal["fail", "skip"],
                        Query(description="skip: leave bad records out and list them")] = "fail",
) -> Response:
    # Ids are not echoed in a drift report, so an id_column need not be present. Missing values are kept
    # (no "too many missing" rule as in assign): a feed sending nulls is what the missing-share test is for.
    arrow = wants_arrow(request)          # Accept: the answer's format (JSON unless Arrow is asked for)
    loaded, _, batch = await read_version_batch(request, store, name, version, settings=settings,
                                             max_rows=settings.max_drift_rows, echo_ids=False)
    rows, errors = split_good_rows(batch, on_error == "skip")
    if rows.size < settings.drift_min_rows:
        usable = "usable records" if errors else "records"
        raise InvalidInput([RecordProblem(
            None, "records", f"the batch has {rows.size} {usable}; a drift report needs at least "
            f"{settings.drift_min_rows} (setting SEGSCORE_DRIFT_MIN_ROWS)")])
    values = batch.values if rows.size == batch.values.shape[0] else batch.values[rows]
    report = await anyio.to_thread.run_sync(build_and_store, store, loaded, values, drift_rules(settings), errors,
                                            rows)
    request.app.state.metrics.drift_report(report)
    if arrow:
        body = await anyio.to_thread.run_sync(arrow_answers.drift_answer, report)
        return Response(body, media_type=ARROW_STREAM_TYPE, headers=VARY_ACCEPT)
    return Response(orjson.dumps(report), media_type="application/json", headers=VARY_ACCEPT)


@router.get("/{name}/drift", response_model=DriftReportList, dependencies=[DriftScope, StrictQuery],
            summary="Stored drift reports, newest first", responses=error_responses(401, 403, 404, 422, 503))
async def list_drift_reports(
    name: str,
    store: StoreDep,
    version: Annotated[VersionNumber | None, Query(description="only reports computed against this version")] = None,
    limit: Annotated[int, BeforeValidator(plain_decimal),
                     Query(ge=1, le=MAX_LIST_LIMIT, description="at most this many reports")] = DEFAULT_LIST_LIMIT,
) -> Response:
    check_name(name)

    def read() -> list[dict[str, Any]]:
        if version is not None:
            store.resolve_version(name, version)  # 404 for an unknown segmentation or version
        return store.list_drift_reports(name, version=version, limit=limit)

    reports = await anyio.to_thread.run_sync(read)
    return Response(orjson.dumps({"reports": reports}), media_type="application/json")



@router.get("/{name}/drift/live", response_model=DriftReport, dependencies=[DriftScope, StrictQuery],
            summary="Drift of the records assigned in a recent time window (from live counts, every replica)",
            responses=error_responses(401, 403, 404, 409, 422, 503))
async def live_drift(
    name: str,
    request: Request,
    settings: SettingsDep,
    store: StoreDep,
    window: Annotated[str, Query(description="how far back: a whole number and s, m, h or d (e.g. 30m, 1h)")] = "1h",
    version: Annotated[VersionNumber | None, Query(description="default: the live version")] = None,
    store_report: Annotated[bool, Query(alias="store", description="true: keep it in the drift history")] = False,
) -> Response:
    # The same shape and status rules as a batch report, over whole time buckets of the merged counts of every
    # replica (this one's latest counts are flushed first); the report's ``live`` says which tests differ.
    check_name(name)
    live = request.app.state.live
    if not live.enabled:
        raise LiveDriftOff()
    seconds = parse_window(window, max_seconds=settings.live_retention_days * 86_400)
    loaded, labels = await store.serving(name, version)

    def build() -> dict[str, Any]:
        live.flush()
        body = live_drift_report(store, loaded, labels, window_text=window, window_seconds=seconds,
                                 bucket_seconds=settings.live_bucket_seconds, now=time.time(),
                                 rules=drift_rules(settings), min_records=settings.drift_min_rows)
        report = {"id": uuid.uuid4().hex, "name": loaded.name, "version": loaded.version, "created_at": _now(),
                  **body, "skipped_records": 0, "errors": []}
        DriftReport.model_validate(report)
        if store_report:
            store.save_drift_report(report)
        return report

    report = await anyio.to_thread.run_sync(build)
    if store_report:
        request.app.state.metrics.drift_report(report)
    return Response(orjson.dumps(report), media_type="application/json")
