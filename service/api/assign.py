"""Assign records to the nearest segment of a version, with outlier flags."""

from __future__ import annotations

from typing import Annotated, Any, Literal

import anyio
import numpy as np
import orjson
from fastapi import APIRouter, Query, Request
from fastapi.responses import Response

from schemas import AssignResponse
from schemas.assign import AssignRequest
from service.api.payload import read_version_batch, request_body_openapi, too_many_missing
from service.api.validation import StrictQuery, VersionNumber, error_responses
from service.core.assign import Assignment, assign, impute
from service.core.frame import MAX_LISTED_PROBLEMS, Batch
from service.deps import AssignScope, SettingsDep, StoreDep
from service.errors import InvalidRecords, RecordProblem
from service.store import LoadedVersion

router = APIRouter(prefix="/segmentations", tags=["assign"])

RECORDS_BODY = request_body_openapi(AssignRequest, "header row, then one row per record")
_REASONS = ([], ["distance"], ["residual"], ["distance", "residual"])
_NO_IMPUTED: list[str] = []


def split_good_rows(batch: Batch, skip_bad: bool) -> tuple[np.ndarray, list[dict[str, Any]]]:
    """Row indices to compute, and the error items to return (raises unless ``skip_bad``)."""
    if not batch.problems:
        return np.arange(batch.values.shape[0]), []
    if not skip_bad:
        raise InvalidRecords(batch.problems[:MAX_LISTED_PROBLEMS])
    good = np.ones(batch.values.shape[0], dtype=bool)
    good[batch.bad_rows] = False
    return np.flatnonzero(good), [p.as_dict() for p in batch.problems]


def run_assignment(loaded: LoadedVersion, values: np.ndarray,
                   rows: np.ndarray | None = None) -> tuple[Assignment, np.ndarray | None]:
    """Impute and assign; a record whose distances overflow float64 is a 422 (never a null in the answer).

    ``rows``: the input index of each row of ``values`` (for the error items; default 0..n-1)."""
    filled, missing = impute(loaded.compiled, values)
    try:
        result = assign(loaded.compiled, filled)
    except (FloatingPointError, RuntimeWarning):
        # Only where numpy's overflow warnings are errors (the tests): compute again, then refuse below.
        with np.errstate(over="ignore", invalid="ignore"):
            result = assign(loaded.compiled, filled)
    finite = np.isfinite(result.distance) & np.isfinite(result.residual)
    if result.margin is not None:
        finite &= np.isfinite(result.margin)
    if not finite.all():
        bad = np.flatnonzero(~finite)
        index = bad if rows is None else rows[bad]
        raise InvalidRecords([RecordProblem(int(i), "", "the record's values are too far from the training data "
                                            "for its distances to be computed in float64; check the units")
                              for i in index[:MAX_LISTED_PROBLEMS]])
    return result, missing


def build_results(loaded: LoadedVersion, labels: dict[int, str], ids: list[Any], rows: np.ndarray,
                  result: Assignment, missing: np.ndarray | None) -> list[dict[str, Any]]:
    """Column arrays -> one JSON object per record (plain Python types only)."""
    features = loaded.compiled.features
    segment_labels = [labels.get(c) for c in range(loaded.compiled.k)]
    n = rows.size
    if n == len(ids):
        ids_out = ids
    else:
        ids_out = [ids[i] for i in rows.tolist()]
    segments = result.segment.tolist()
    reasons = (result.far.astype(np.int8) + 2 * result.off_plane.astype(np.int8)).tolist()
    runner_up = result.runner_up.tolist() if result.runner_up is not None else [None] * n
    margin = result.margin.tolist() if result.margin is not None else [None] * n
    imputed = [_NO_IMPUTED] * n
    if missing is not None:
        for i in np.flatnonzero(missing.any(axis=1)).tolist():
            imputed[i] = [features[j] for j in np.flatnonzero(missing[i]).tolist()]
    return [
        {"id": i, "segment": s, "label": segment_labels[s], "distance": d, "outlier": r > 0,
         "outlier_reasons": _REASONS[r], "runner_up": u, "margin": m, "residual": e, "imputed": imp}
        for i, s, d, r, u, m, e, imp in zip(ids_out, segments, result.distance.tolist(), reasons, runner_up,
                                            margin, result.residual.tolist(), imputed)
    ]


def count_assigned(metrics, name: str, version: int, result: Assignment) -> None:
    for segment, count in enumerate(np.bincount(result.segment).tolist()):
        if count:
            metrics.assigned.labels(name, str(version), str(segment)).inc(count)
    flagged = int(np.count_nonzero(result.far | result.off_plane))
    if flagged:
        metrics.outliers.labels(name).inc(flagged)


@router.post("/{name}/assign", response_model=AssignResponse, openapi_extra=RECORDS_BODY,
             dependencies=[AssignScope, StrictQuery], summary="Assign records to segments",
             responses=error_responses(400, 401, 403, 404, 409, 413, 415, 422, 500, 503))
async def assign_records(
    name: str,
    request: Request,
    settings: SettingsDep,
    store: StoreDep,
    version: Annotated[VersionNumber | None, Query(description="default: the live version")] = None,
    on_error: Annotated[Literal["fail", "skip"], Query(description="skip: answer for the good records")] = "fail",
) -> Response:
    loaded, labels, batch = await read_version_batch(request, store, name, version, settings=settings,
                                             max_rows=settings.max_assign_rows, echo_ids=True)
    number, features = loaded.version, list(loaded.compiled.features)
    too_many_missing(batch, features)
    rows, errors = split_good_rows(batch, on_error == "skip")
    values = batch.values if rows.size == batch.values.shape[0] else batch.values[rows]

    def compute() -> tuple[list[dict[str, Any]], Assignment]:
        result, missing = run_assignment(loaded, values, rows)
        return build_results(loaded, labels, batch.ids, rows, result, missing), result

    if rows.size <= settings.inline_assign_rows:
        results, assignment = compute()
    else:
        results, assignment = await anyio.to_thread.run_sync(compute)
    count_assigned(request.app.state.metrics, name, number, assignment)
    request.app.state.live.observe(loaded, values, assignment)      # live drift (service/live): queues only
    body = {"name": name, "version": number, "results": results, "errors": errors}
    return Response(orjson.dumps(body), media_type="application/json")
