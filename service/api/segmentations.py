"""Fit, list, read, promote and label segmentations."""

from __future__ import annotations

import time
from typing import Annotated, Any

import anyio
from fastapi import APIRouter, Path, Request
from fastapi.responses import JSONResponse, Response

from schemas import FitReport, FitRequest, LabelUpdate, LiveUpdate, Segment, SegmentationDetail, SegmentationList
from service.api.payload import (
    body_kind,
    check_name,
    large_body_slot,
    read_body,
    request_body_openapi,
)
from service.api.validation import (
    SegmentNumber,
    StrictQuery,
    VersionNumber,
    error_responses,
    printable,
)
from service.deps import ActorDep, AdminScope, FitScope, ReadScope, SettingsDep, StoreDep
from service.errors import InvalidInput, RecordProblem
from service.fitting import fit_in_worker
from service.inputs.fit_input import QUERY_PARAMETERS, prepare_fit_request

router = APIRouter(prefix="/segmentations", tags=["segmentations"])


def _csv_query_parameters_openapi() -> list[dict[str, Any]]:
    """The CSV form's fit parameters as OpenAPI query parameters (the JSON form takes them in the body)."""
    described = {
        "features": "comma-separated columns (default: every numeric column except id_column)",
        "k": "an int, or a range like 2-10",
        "components": "an int, a variance share in (0, 1), or 'none'",
    }
    parameters = []
    for name in sorted(QUERY_PARAMETERS):
        field = FitRequest.model_fields[name]
        text = described.get(name) or field.description or f"as the JSON body's '{name}'"
        parameters.append({"name": name, "in": "query", "required": False, "schema": {"type": "string"},
                           "description": f"text/csv bodies only: {text}"})
    return parameters


FIT_BODY = {**request_body_openapi(FitRequest, "header row, then one row per record; parameters in the query "
                                   "string (features=a,b&k=2-10&components=none)"),
            "parameters": _csv_query_parameters_openapi()}


@router.post("/{name}/fit", status_code=201, response_model=FitReport, openapi_extra=FIT_BODY,
             dependencies=[FitScope, StrictQuery], summary="Fit a new version from records",
             responses=error_responses(400, 401, 403, 413, 415, 422, 500, 503))
async def fit(name: str, request: Request, settings: SettingsDep, store: StoreDep, actor: ActorDep) -> JSONResponse:
    check_name(name)
    csv = body_kind(request) == "csv"
    if not csv and request.query_params:
        # A JSON body carries its parameters; a ?k=3 beside it would otherwise be ignored without a word.
        raise InvalidInput([RecordProblem(None, printable(key), "a JSON fit takes its parameters in the body; "
                                          "query parameters are for text/csv bodies")
                            for key in dict.fromkeys(request.query_params.keys())])
    async with large_body_slot(request, settings):
        body = await read_body(request, settings.max_body_bytes)
        # Parsing and checking a big body is CPU work too: like the fit, it runs off the event loop.
        plan = await anyio.to_thread.run_sync(prepare_fit_request, body, csv, request.query_params, settings)

    def fit_and_save() -> dict[str, Any]:
        # The store is written here, by the server, after the fit returned: a failed fit writes nothing.
        if plan.engine == "dask":
            # On the cluster: this thread only waits and combines aggregates (the data stays on the workers).
            # When background jobs exist, this call moves into the job, with the job's progress callback and a
            # CancelHook the job's cancel calls (README, "Fitting on a Dask cluster").
            from service.engines.dask_engine import run_dask_fit
            bundle = run_dask_fit(plan.values, plan.config, source=plan.source, settings=settings)
        else:
            # In a worker process (service.fitting).
            bundle = fit_in_worker(plan.values, plan.config, max_agglomerative_rows=settings.max_agglomerative_rows,
                                   time_limit=settings.fit_time_limit_seconds)
        return store.save_version(name, bundle, make_live=plan.make_live, actor=actor)

    started = time.perf_counter()
    report = await anyio.to_thread.run_sync(fit_and_save, limiter=request.app.state.fit_limiter)
    request.app.state.metrics.fit_seconds.observe(time.perf_counter() - started)
    request.app.state.metrics.fits.inc()
    return JSONResponse(report, status_code=201)


@router.get("", response_model=SegmentationList, dependencies=[ReadScope, StrictQuery], summary="List segmentations",
            responses=error_responses(401, 403, 422, 503))
def list_segmentations(store: StoreDep) -> dict[str, Any]:
    return {"segmentations": store.list_segmentations()}


@router.get("/{name}", response_model=SegmentationDetail, dependencies=[ReadScope, StrictQuery],
            summary="A segmentation with a summary row per version",
            responses=error_responses(401, 403, 404, 422, 503))
def get_segmentation(name: str, store: StoreDep) -> dict[str, Any]:
    return store.get_segmentation(check_name(name))


@router.get("/{name}/versions/{version}", response_model=FitReport, dependencies=[ReadScope, StrictQuery],
            summary="The fit report of one version", responses=error_responses(401, 403, 404, 422, 503))
def get_version(name: str, version: Annotated[VersionNumber, Path()], store: StoreDep) -> dict[str, Any]:
    return store.version_report(check_name(name), version)


@router.put("/{name}/live", response_model=SegmentationDetail, dependencies=[FitScope, StrictQuery],
            summary="Make a version live (promote or roll back)",
            responses=error_responses(400, 401, 403, 404, 422, 503))
def set_live(name: str, update: LiveUpdate, store: StoreDep, actor: ActorDep) -> dict[str, Any]:
    return store.set_live(check_name(name), update.version, actor=actor)


@router.patch("/{name}/versions/{version}/segments/{segment}", response_model=Segment, dependencies=[FitScope, StrictQuery],
              summary="Label a segment (metadata only)", responses=error_responses(400, 401, 403, 404, 422, 503))
def label_segment(name: str, version: Annotated[VersionNumber, Path()], segment: Annotated[SegmentNumber, Path()],
                  update: LabelUpdate, store: StoreDep, actor: ActorDep) -> dict[str, Any]:
    return store.set_label(check_name(name), version, segment, update.label, actor=actor)


@router.delete("/{name}/versions/{version}", status_code=204, dependencies=[FitScope, StrictQuery],
               summary="Erase a version that is not live (its artifact, report, labels and drift reports)",
               responses=error_responses(400, 401, 403, 404, 409, 422, 503))
def delete_version(name: str, version: Annotated[VersionNumber, Path()], store: StoreDep, actor: ActorDep) -> Response:
    store.delete_version(check_name(name), version, actor=actor)
    return Response(status_code=204)


@router.delete("/{name}", status_code=204, dependencies=[AdminScope, StrictQuery],
               summary="Erase a segmentation: every version, artifact, report, label and drift report",
               responses=error_responses(400, 401, 403, 404, 422, 503))
def delete_segmentation(name: str, store: StoreDep, actor: ActorDep) -> Response:
    store.delete_segmentation(check_name(name), actor=actor)
    return Response(status_code=204)
