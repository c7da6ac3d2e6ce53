"""Fit, list, read, promote and label segmentations."""

from __future__ import annotations

import functools
import time
import pathlib
from typing import Annotated, Any

import anyio
from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import JSONResponse, Response

from schemas import FitReport, FitRequest, Job, LabelUpdate, LiveUpdate, Segment, SegmentationDetail, SegmentationList
from service.api.payload import (
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
from service.api.upload import (
    PARQUET_TYPES,
    fit_body_kind,
    spool_upload,
)
from service.engines import CLUSTER_ENGINE, check_before_fit, resolve_engine
from service.fitting import run_fit
from service.memory import release_free_memory
from service.inputs.fit_input import QUERY_PARAMETERS, prepare_fit_request
from service.inputs.streamed import new_upload_directory, prepare_streamed_fit, remove_upload_directory

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


def _fit_body_openapi() -> dict[str, Any]:
    body = request_body_openapi(FitRequest, "header row, then one row per record (gzip-compressed with "
                                "'Content-Encoding: gzip' or as a .gz file); parameters in the query string "
                                "(features=a,b&k=2-10&components=none&engine=auto)")
    body["requestBody"]["content"][PARQUET_TYPES[0]] = {
        "schema": {"type": "string", "format": "binary",
                   "description": "a Parquet file, one row per record; parameters in the query string as for CSV"}}
    return {**body, "parameters": _csv_query_parameters_openapi()}


FIT_BODY = _fit_body_openapi()


BACKGROUND = "background"
BACKGROUND_ANSWER = {202: {"model": Job, "description": "?background=true: the request was checked and a job "
                           "queued; follow it at the Location header (/v1/jobs/{id})"}}


@router.post("/{name}/fit", status_code=201, response_model=FitReport, openapi_extra=FIT_BODY,
             dependencies=[FitScope, StrictQuery], summary="Fit a new version from records",
             responses={**BACKGROUND_ANSWER, **error_responses(400, 401, 403, 413, 415, 422, 500, 503)})
async def fit(name: str, request: Request, settings: SettingsDep, store: StoreDep, actor: ActorDep,
              background: Annotated[bool, Query(description="true: check the request, answer 202 with a job at "
                                                "once and fit in the background (any body kind)")] = False,
              ) -> JSONResponse:
    check_name(name)
    kind = fit_body_kind(request)
    fit_query = {key: value for key, value in request.query_params.items() if key != BACKGROUND}
    if kind == "json" and fit_query:
        # A JSON body carries its parameters; a ?k=3 beside it would otherwise be ignored without a word.
        raise InvalidInput([RecordProblem(None, printable(key), "a JSON fit takes its parameters in the body; "
                                          "query parameters are for text/csv bodies")
                            for key in fit_query])
    work_dir: pathlib.Path | None = new_upload_directory(settings.upload_dir)
    try:
        async with large_body_slot(request, settings):
            if kind == "json":
                body = await read_body(request, settings.max_body_bytes)
                # Parsing and checking a big body is CPU work too: like the fit, it runs off the event loop.
                # A JSON body holds records or names a ``source`` the Dask workers read (checked: 403).
                plan = await anyio.to_thread.run_sync(prepare_fit_request, body, False, fit_query, settings)
                values, config, make_live, engine, source = (plan.values, plan.config, plan.make_live, plan.engine,
                                                             plan.source)
                del body
            else:
                # Big inputs: CSV (maybe gzip) and Parquet arrive into a file and are read in blocks.
                upload = await spool_upload(request, settings.max_body_bytes, work_dir)
                values, config, make_live = await anyio.to_thread.run_sync(functools.partial(
                    prepare_streamed_fit, upload, kind, fit_query, settings, work_dir=work_dir))
                upload.unlink()
                engine, source = resolve_engine(config.engine, values.shape[0], settings), None

        if background or engine == CLUSTER_ENGINE:
            # A fit on the cluster always runs as a job (it may take long; its progress is worth following).
            # A bad request never becomes a job: what the worker would refuse (k above the distinct records, a
            # constant named feature...) is refused here, with the synchronous fit's answer.
            if values is not None:
                await anyio.to_thread.run_sync(lambda: check_before_fit(
                    values, config, max_agglomerative_rows=settings.max_agglomerative_rows))
            job = await request.app.state.jobs.submit(name, values, config, make_live=make_live, actor=actor,
                                                      engine=engine, work_dir=work_dir, source=source)
            work_dir = None                     # the job owns the directory now and removes it when it ends
            return JSONResponse(job, status_code=202, headers={"Location": f"/v1/jobs/{job['id']}"})

        def fit_and_save() -> dict[str, Any]:
            # The store is written here, by the server, after the fit returned: a failed fit writes nothing.
            bundle = run_fit(values, config, engine=engine, source=source, settings=settings)
            return store.save_version(name, bundle, make_live=make_live, actor=actor)

        started = time.perf_counter()
        report = await anyio.to_thread.run_sync(fit_and_save, limiter=request.app.state.fit_limiter)
        values = None                   # the matrix too: its pages go back with the rest
        await anyio.to_thread.run_sync(release_free_memory)    # the parse's and the fit's freed buffers
    finally:
        if work_dir is not None:
            remove_upload_directory(work_dir)
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
