"""Assign records to the nearest segment of a version, with outlier flags."""

from __future__ import annotations

import math
from time import perf_counter
from typing import Annotated, Any, Literal
from urllib.parse import parse_qsl

import anyio
import numpy as np
import orjson
from fastapi import APIRouter, Query, Request
from fastapi.responses import Response

from schemas import AssignResponse
from schemas.assign import AssignRequest
from service.api import arrow_answers, payload
from service.api.payload import (
    ARROW_STREAM_TYPE,
    VARY_ACCEPT,
    accepts_arrow,
    check_name,
    kind_of_content_type,
    length_is_small,
    read_version_batch,
    receive_within,
    refuse_declared_length,
    request_body_openapi,
    too_many_missing,
    wants_arrow,
)
from service.api.turns import TurnBatch
from service.api.validation import MAX_VERSION, PLAIN_DECIMAL, StrictQuery, VersionNumber, error_responses
from service.core.assign import Assignment, OneAssignment, assign, assign_one, impute
from service.core.frame import MAX_LISTED_PROBLEMS, Batch
from service.deps import AssignScope, SettingsDep, StoreDep, actor_of, key_of_authorization
from service.errors import InvalidRecords, RecordProblem, ServiceError
from service.logs import request_id_from, request_id_var
from service.middleware import INTERNAL_ERROR_END, INTERNAL_ERROR_START, log_unexpected, timed_receive
from service.settings import Settings
from service.store import BundleStore, LoadedVersion

router = APIRouter(prefix="/segmentations", tags=["assign"])
ASSIGN_SCOPE = AssignScope.dependency.required_scope     # the assign lane checks the same scope

RECORDS_BODY = request_body_openapi(AssignRequest, "header row, then one row per record", arrow=True,
                                    answer=AssignResponse)
_REASONS = ([], ["distance"], ["residual"], ["distance", "residual"])
_NO_IMPUTED: list[str] = []
_ONE_ROW = np.zeros(1, dtype=np.intp)      # the row indices of a one-record batch (read only, shared)
_ONE_ROW.flags.writeable = False


def split_good_rows(batch: Batch, skip_bad: bool) -> tuple[np.ndarray, list[dict[str, Any]]]:
    """Row indices to compute, and the error items to return (raises unless ``skip_bad``)."""
    if not batch.problems:
        n = batch.values.shape[0]
        return (_ONE_ROW if n == 1 else np.arange(n)), []
    if not skip_bad:
        raise InvalidRecords(batch.problems[:MAX_LISTED_PROBLEMS])
    good = np.ones(batch.values.shape[0], dtype=bool)
    good[batch.bad_rows] = False
    return np.flatnonzero(good), [p.as_dict() for p in batch.problems]


TOO_FAR = "the record's values are too far from the training data for its distances to be computed in float64; " \
          "check the units"


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
    if result.one is not None and _finite(result.one):    # one record: three float tests, not five array operations
        return result, missing
    finite = np.isfinite(result.distance) & np.isfinite(result.residual)
    if result.margin is not None:
        finite &= np.isfinite(result.margin)
    if not finite.all():
        bad = np.flatnonzero(~finite)
        index = bad if rows is None else rows[bad]
        raise InvalidRecords([RecordProblem(int(i), "", TOO_FAR) for i in index[:MAX_LISTED_PROBLEMS]])
    return result, missing


def _finite(one: OneAssignment) -> bool:
    """Whether the distance, residual and margin (None when k == 1) of one record are all finite."""
    margin = one.margin
    return math.isfinite(one.distance) and math.isfinite(one.residual) and (margin is None or math.isfinite(margin))


def score_one(loaded: LoadedVersion, row) -> OneAssignment:
    """``run_assignment`` for one record with no missing value, as ``assign_one``'s Python numbers (no arrays):
    the same scoring and the same 422 for a record whose distances overflow float64."""
    try:
        one = assign_one(loaded.compiled, row)
    except (FloatingPointError, RuntimeWarning):
        with np.errstate(over="ignore", invalid="ignore"):      # as run_assignment
            one = assign_one(loaded.compiled, row)
    if not _finite(one):
        raise InvalidRecords([RecordProblem(0, "", TOO_FAR)])
    return one


def result_of(record_id: Any, one: OneAssignment, label_of, imputed: list[str]) -> dict[str, Any]:
    """One answer item from ``assign_one``'s answer (``build_results`` for one record)."""
    segment, distance, runner_up, margin, residual, far, off_plane = one
    reason = int(far) + 2 * int(off_plane)
    return {"id": record_id, "segment": segment, "label": label_of(segment), "distance": distance,
            "outlier": reason > 0, "outlier_reasons": _REASONS[reason], "runner_up": runner_up, "margin": margin,
            "residual": residual, "imputed": imputed}


def build_results(loaded: LoadedVersion, labels: dict[int, str], ids: list[Any], rows: np.ndarray,
                  result: Assignment, missing: np.ndarray | None) -> list[dict[str, Any]]:
    """Column arrays -> one JSON object per record (plain Python types only)."""
    features = loaded.compiled.features
    label_of = labels.get
    n = rows.size
    one = result.one
    if one is not None and n == 1 == len(ids):     # one record: its Python values, no array reads
        imputed = _NO_IMPUTED if missing is None else [features[j] for j in np.flatnonzero(missing[0]).tolist()]
        return [result_of(ids[0], one, label_of, imputed)]
    if n == len(ids):
        ids_out = ids
    else:
        ids_out = [ids[i] for i in rows.tolist()]
    segments = result.segment.tolist()
    if n == 1:        # one record: two item reads instead of four array operations
        reasons = [int(result.far.item()) + 2 * int(result.off_plane.item())]
    else:
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
    one = result.one
    if one is not None:              # one record: its Python values instead of a bincount and a count
        metrics.count_assigned(name, version, ((one.segment, 1),), int(one.far or one.off_plane))
        return
    flagged = int(np.count_nonzero(result.far | result.off_plane))
    counts = np.bincount(result.segment).tolist()
    metrics.count_assigned(name, version, [(segment, count) for segment, count in enumerate(counts) if count],
                           flagged)


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
    # This route describes the API (OpenAPI) and answers the requests the assign lane below leaves to the app
    # (those with a query string other than plain ``version``/``on_error``); both answer through ``assign_answer``.
    return await answer_assign(request, name, version, on_error, settings, store)


async def answer_assign(request: Request, name: str, version: int | None, on_error: str, settings: Settings,
                        store: BundleStore) -> Response:
    """The route's work once the caller is authorized and the query is read: body -> checked batch ->
    ``assign_answer``."""
    arrow = wants_arrow(request)          # Accept: the answer's format (JSON unless Arrow is asked for)
    loaded, labels, batch = await read_version_batch(request, store, name, version, settings=settings,
                                                     max_rows=settings.max_assign_rows, echo_ids=True)
    state = request.app.state
    answer = await assign_answer(settings, state.metrics, state.live, name, loaded, labels, batch, on_error, arrow)
    return Response(answer, media_type=ARROW_STREAM_TYPE if arrow else "application/json", headers=VARY_ACCEPT)


def one_record_answer(metrics, live, name: str, loaded: LoadedVersion, labels: dict[int, str], row, record_id) -> bytes:
    """``assign_answer`` for one record with every value present (the single-record call), its p values a tuple
    of Python numbers (the assign lane's ``PlainRecord.row``) or a 1-D array: scored as Python numbers
    (``score_one``), no arrays built per request, the same answer bytes, counters and live drift."""
    one = score_one(loaded, row)
    segment, far, off_plane = one.segment, one.far, one.off_plane
    metrics.count_assigned(name, loaded.version, ((segment, 1),), int(far or off_plane))
    live.observe_one(loaded, row, segment, far, off_plane, one.residual)
    return orjson.dumps({"name": name, "version": loaded.version,
                         "results": [result_of(record_id, one, labels.get, _NO_IMPUTED)], "errors": []})


async def assign_answer(settings: Settings, metrics, live, name: str, loaded: LoadedVersion, labels: dict[int, str],
                        batch: Batch, on_error: str, arrow: bool) -> bytes:
    """A checked batch -> scoring (``run_assignment``) -> counters (``metrics``) and live drift (``live``) -> the
    answer's bytes (``build_results`` as JSON, or Arrow). Shared by the FastAPI route and the assign lane."""
    if not arrow and not batch.may_have_nan and not batch.problems and batch.values.shape[0] == 1:
        return one_record_answer(metrics, live, name, loaded, labels, batch.values[0], batch.ids[0])
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
    count_assigned(metrics, name, loaded.version, assignment)
    live.observe(loaded, values, assignment)      # live drift (service/live): queues only
    if arrow:
        return results
    return orjson.dumps({"name": name, "version": loaded.version, "results": results, "errors": errors})


# --------------------------------------------------------------------------- the assign lane
ASSIGN_PATH = "/v1/segmentations/{name}/assign"
_PATH_HEAD, _PATH_TAIL = ASSIGN_PATH.split("{name}")
_QUERY_NAMES = frozenset({"version", "on_error"})
_ON_ERROR = frozenset({"fail", "skip"})
_NO_PATH_PARAMS: dict[str, Any] = {}
_VARY = (b"vary", b"Accept")


def plain_query(query: bytes) -> tuple[int | None, str] | None:
    """(version, on_error) of a query string the lane may answer itself: at most one ``version`` (a plain
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


def lane_name(scope) -> str | None:
    """The segmentation name when ``scope`` is a request the lane answers (``POST`` to ``ASSIGN_PATH``), else
    None. ``{name}`` matches what the route's does: one non-empty path segment."""
    if scope["type"] != "http" or scope["method"] != "POST" or scope.get("root_path"):
        return None
    path = scope["path"]
    if not (path.startswith(_PATH_HEAD) and path.endswith(_PATH_TAIL)):
        return None
    name = path[len(_PATH_HEAD):-len(_PATH_TAIL)]
    return name if name and "/" not in name else None


class AssignLane:
    """``POST /v1/segmentations/{name}/assign``, answered before the app's middleware stack and router.

    The outermost ASGI layer of the app (``create_app`` puts it there). Every request the FastAPI route would
    answer with a plain query string (``plain_query``) is answered here, in one function that does what the
    stack does for that route: the request id (``X-Request-ID``, in the log lines), the body-read time limit
    (408), the body-size limit (413), the key check with the ``assign`` scope (``actor_of``), the error table's
    answers (the app's own ``ServiceError`` handler) and the boundary's 500, the request metrics and access
    log, then ``assign_answer`` (counters, live drift), the FastAPI route's own work. Per request that saves
    the middlewares' ``send`` wrappers, the routing walk and FastAPI's dependency solving: most of a
    single-record request's cost. A single-record JSON body (announced small) is read straight from
    ``receive`` with no Request object; other bodies (CSV, Arrow, large) go through the route's reader.

    Anything else (other routes, other methods, other query strings, a root path) goes to ``app``, the full
    stack, where the FastAPI route, the one the OpenAPI description documents, answers with its own 422
    items. ``tests/api/test_assign_lean.py`` sends the same requests both ways and requires the same answers,
    errors, auth refusals, request ids and metrics."""

    def __init__(self, app, service) -> None:
        self.app = app                            # the full middleware stack and router
        self.on_service_error = service.exception_handlers[ServiceError]      # the error table's answers
        # What create_app put in the app's state, bound once (a State attribute read costs a Python call).
        state = service.state
        self.settings: Settings = state.settings
        self.store: BundleStore = state.store
        self.keyring = state.keyring
        self.metrics = state.metrics
        self.live = state.live
        self.single_records = TurnBatch()

    async def __call__(self, scope, receive, send) -> None:
        name = lane_name(scope)
        query = None if name is None else plain_query(scope["query_string"])
        if query is None:
            await self.app(scope, receive, send)
            return
        headers = dict(reversed(scope["headers"]))       # the first of repeated headers, as Starlette reads them
        sent_id = headers.get(b"x-request-id")
        request_id = request_id_from(None if sent_id is None else sent_id.decode("latin-1"))
        token = request_id_var.set(request_id)
        id_header = (b"x-request-id", request_id.encode())
        started = perf_counter()
        status = 500
        try:
            try:
                status, content_type, answer = await self._answer(scope, receive, headers, name, *query)
                start = {"type": "http.response.start", "status": status, "headers": [
                    (b"content-length", str(len(answer)).encode()), (b"content-type", content_type), _VARY, id_header]}
                end = {"type": "http.response.body", "body": answer}
            except ServiceError as exc:
                response = await self.on_service_error(Request(scope, receive), exc)
                status = response.status_code
                start = {"type": "http.response.start", "status": status,
                         "headers": [*response.raw_headers, id_header]}
                end = {"type": "http.response.body", "body": response.body}
            except Exception as exc:         # what ErrorBoundary does for the other routes
                log_unexpected(exc, scope)
                start = {**INTERNAL_ERROR_START, "headers": [*INTERNAL_ERROR_START["headers"], id_header]}
                end = INTERNAL_ERROR_END
            await send(start)
            await send(end)
        finally:
            access_log = self.settings.access_log
            self.metrics.request_done("POST", ASSIGN_PATH, status, perf_counter() - started,
                                      {"name": name} if access_log else _NO_PATH_PARAMS, access_log)
            request_id_var.reset(token)

    async def _answer(self, scope, receive, headers: dict[bytes, bytes], name: str, version: int | None,
                      on_error: str) -> tuple[int, bytes, bytes]:
        """(status, content type, body) of an answered request; raises the errors the error table answers."""
        settings = self.settings
        authorization = headers.get(b"authorization")
        key = None if authorization is None else key_of_authorization(authorization.decode("latin-1"))
        actor_of(self.keyring, key, ASSIGN_SCOPE)          # assign writes nothing: the actor is not kept
        content_type = headers.get(b"content-type", b"")
        declared = headers.get(b"content-length")
        declared = None if declared is None else declared.decode("latin-1")
        accept = headers.get(b"accept")
        arrow = accept is not None and accepts_arrow(accept.decode("latin-1"))
        json = content_type == b"application/json" or kind_of_content_type(content_type.decode("latin-1"),
                                                                           arrow=True) == "json"
        if arrow or not json or not length_is_small(declared, settings):
            # CSV, Arrow, a large or unannounced body: the route's own reader (slot, worker thread).
            receive = timed_receive(receive, settings.body_read_timeout_seconds)
            response = await answer_assign(Request(scope, receive), name, version, on_error, settings, self.store)
            return response.status_code, response.media_type.encode("latin-1"), response.body
        # A small JSON body, checked in the order of read_version_batch: name, version, body.
        check_name(name)
        loaded, labels = await self.store.serving(name, version)
        refuse_declared_length(declared, settings.max_body_bytes)
        body = await receive_within(receive, settings.max_body_bytes, settings.body_read_timeout_seconds)
        features, id_column = loaded.compiled.features, loaded.bundle.config.id_column
        record = payload.plain_single_record(body, features, id_column)   # one plain record: parsed once
        if record is not None and not record.nulls:
            # Scored with the other single records of this turn of the loop, back to back (service/api/turns.py).
            answer = await self.single_records.call(one_record_answer, self.metrics, self.live, name, loaded, labels,
                                                    record.row, record.ident)
            return 200, b"application/json", answer
        if record is not None:
            batch = record.batch()
        else:
            batch = payload.parse_batch("json", body, list(features), id_column, settings.max_assign_rows)
        answer = await assign_answer(settings, self.metrics, self.live, name, loaded, labels, batch, on_error, False)
        return 200, b"application/json", answer
