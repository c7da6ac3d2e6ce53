"""Assign records to the nearest segment of a version, with outlier flags."""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal
from urllib.parse import parse_qsl

import anyio
import numpy as np
import orjson
from fastapi import APIRouter, Query, Request
from fastapi.responses import Response
from starlette.routing import Match, Route

from schemas import AssignResponse
from schemas.assign import AssignRequest
from service.api import arrow_answers
from service.api.payload import (
    ARROW_STREAM_TYPE,
    VARY_ACCEPT,
    read_version_batch,
    request_body_openapi,
    too_many_missing,
    wants_arrow,
)
from service.api.validation import MAX_VERSION, PLAIN_DECIMAL, StrictQuery, VersionNumber, error_responses
from service.core.assign import Assignment, assign, impute
from service.core.frame import MAX_LISTED_PROBLEMS, Batch
from service.deps import AssignScope, SettingsDep, StoreDep, authorize, bearer_key
from service.errors import InvalidRecords, RecordProblem
from service.settings import Settings
from service.store import BundleStore, LoadedVersion

router = APIRouter(prefix="/segmentations", tags=["assign"])
ASSIGN_SCOPE = AssignScope.dependency.required_scope     # the lean route checks the same scope

RECORDS_BODY = request_body_openapi(AssignRequest, "header row, then one row per record", arrow=True,
                                    answer=AssignResponse)
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


def run_assignment(loaded: LoadedVersion, values: np.ndarray, rows: np.ndarray | None = None, *,
                   may_have_nan: bool = True) -> tuple[Assignment, np.ndarray | None]:
    """Impute and assign; a record whose distances overflow float64 is a 422 (never a null in the answer).

    ``rows``: the input index of each row of ``values`` (for the error items; default 0..n-1).
    ``may_have_nan``: False when the reader saw only plain numbers (``Batch.may_have_nan``): nothing to impute."""
    filled, missing = impute(loaded.compiled, values) if may_have_nan else (values, None)
    try:
        result = assign(loaded.compiled, filled)
    except (FloatingPointError, RuntimeWarning):
        # Only where numpy's overflow warnings are errors (the tests): compute again, then refuse below.
        with np.errstate(over="ignore", invalid="ignore"):
            result = assign(loaded.compiled, filled)
    if result.distance.size == 1:     # one record: three float tests instead of five array operations
        margin = 0.0 if result.margin is None else result.margin.item()
        if math.isfinite(result.distance.item()) and math.isfinite(result.residual.item()) and math.isfinite(margin):
            return result, missing
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
    label_of = labels.get
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
        {"id": i, "segment": s, "label": label_of(s), "distance": d, "outlier": r > 0,
         "outlier_reasons": _REASONS[r], "runner_up": u, "margin": m, "residual": e, "imputed": imp}
        for i, s, d, r, u, m, e, imp in zip(ids_out, segments, result.distance.tolist(), reasons, runner_up,
                                            margin, result.residual.tolist(), imputed)
    ]


def count_assigned(metrics, name: str, version: int, result: Assignment) -> None:
    flagged = int(np.count_nonzero(result.far | result.off_plane))
    metrics.count_assigned(name, version, np.bincount(result.segment).tolist(), flagged)


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
    # This route describes the API (OpenAPI) and answers the requests the lean route below hands over (those
    # with a query string other than plain ``version``/``on_error``); both answer through ``answer_assign``.
    return await answer_assign(request, name, version, on_error, settings, store)


async def answer_assign(request: Request, name: str, version: int | None, on_error: str, settings: Settings,
                        store: BundleStore) -> Response:
    """The route's work once the caller is authorized and the query is read: body -> checked batch ->
    scoring (``run_assignment``) -> counters -> answer (``build_results``, or Arrow when Accept asks for it)."""
    arrow = wants_arrow(request)          # Accept: the answer's format (JSON unless Arrow is asked for)
    loaded, labels, batch = await read_version_batch(request, store, name, version, settings=settings,
                                                     max_rows=settings.max_assign_rows, echo_ids=True)
    features = loaded.compiled.features
    too_many_missing(batch, features)
    rows, errors = split_good_rows(batch, on_error == "skip")
    values = batch.values if rows.size == batch.values.shape[0] else batch.values[rows]

    def compute() -> tuple[Any, Assignment]:
        result, missing = run_assignment(loaded, values, rows, may_have_nan=batch.may_have_nan)
        if arrow:
            return arrow_answers.assign_answer(name, loaded.version, features, labels, loaded.compiled.k, batch.ids,
                                               rows, result, missing, errors), result
        return build_results(loaded, labels, batch.ids, rows, result, missing), result

    if rows.size <= settings.inline_assign_rows:
        results, assignment = compute()
    else:
        results, assignment = await anyio.to_thread.run_sync(compute)
    count_assigned(request.app.state.metrics, name, loaded.version, assignment)
    request.app.state.live.observe(loaded, values, assignment)      # live drift (service/live): queues only
    if arrow:
        return Response(results, media_type=ARROW_STREAM_TYPE, headers=VARY_ACCEPT)
    body = {"name": name, "version": loaded.version, "results": results, "errors": errors}
    return Response(orjson.dumps(body), media_type="application/json", headers=VARY_ACCEPT)


# --------------------------------------------------------------------------- the lean path
ASSIGN_PATH = "/v1/segmentations/{name}/assign"
HANDED_OVER = "segscore.assign_handed_over"     # scope key: the lean route lets the FastAPI route answer
_QUERY_NAMES = frozenset({"version", "on_error"})
_ON_ERROR = frozenset({"fail", "skip"})


def plain_query(query: bytes) -> tuple[int | None, str] | None:
    """(version, on_error) of a query string the lean route may answer itself: at most one ``version`` (a plain
    decimal in range) and one ``on_error`` (fail or skip), nothing else. None for anything else: the FastAPI
    route then answers, with its own 422 items for unknown, malformed or repeated parameters."""
    if not query:
        return None, "fail"
    pairs = parse_qsl(query.decode("latin-1"), keep_blank_values=True)
    keys = [key for key, _ in pairs]
    if len(set(keys)) != len(keys) or not _QUERY_NAMES.issuperset(keys):
        return None
    given = dict(pairs)
    on_error = given.get("on_error", "fail")
    if on_error not in _ON_ERROR:
        return None
    version = given.get("version")
    if version is None:
        return None, on_error
    if not PLAIN_DECIMAL.fullmatch(version) or not 1 <= int(version) <= MAX_VERSION:
        return None
    return int(version), on_error


class LeanAssignRoute(Route):
    """``POST /v1/segmentations/{name}/assign`` without FastAPI's per-request dependency solving and routing walk.

    Mounted first in the app, so it also skips matching the other routes. It is a plain ASGI endpoint inside the
    same middleware (request id, metrics, access log, body timer, error boundary) and error table as every route:
    the same key check (``authorize`` with the ``assign`` scope), then ``answer_assign``, the FastAPI route's own
    work. A request whose query string is anything but plain ``version``/``on_error`` is handed to the FastAPI
    route (``HANDED_OVER``), so its 422 items are exactly those of the documented route. Not in the OpenAPI
    description: the FastAPI route above is what it documents."""

    def __init__(self) -> None:
        super().__init__(ASSIGN_PATH, endpoint=self._answer, methods=["POST"], include_in_schema=False)
        self.app = self._answer          # a plain ASGI endpoint: no request/response wrapper per call

    def matches(self, scope):
        if HANDED_OVER in scope:
            return Match.NONE, {}
        match, child_scope = super().matches(scope)
        if match is not Match.FULL:
            return Match.NONE, {}        # another method: the FastAPI route answers (405), as without this route
        child_scope["route"] = self      # the metrics and the access log read the route's template here
        return match, child_scope

    async def _answer(self, scope, receive, send) -> None:
        query = plain_query(scope["query_string"])
        if query is None:
            scope[HANDED_OVER] = True
            await scope["router"].app(scope, receive, send)
            return
        request = Request(scope, receive)
        authorize(request, bearer_key(request), ASSIGN_SCOPE)
        state = scope["app"].state
        response = await answer_assign(request, scope["path_params"]["name"], *query, state.settings, state.store)
        await response(scope, receive, send)
