"""Background fit jobs: read, list, cancel (a job is started by ``POST .../fit?background=true``)."""

from __future__ import annotations

import re
from typing import Annotated, Any

import anyio
from fastapi import APIRouter, Query, Request
from pydantic import BeforeValidator

from schemas import FitReport, Job, JobList
from service.api.payload import check_name
from service.api.validation import StrictQuery, error_responses, plain_decimal
from service.deps import ActorDep, FitScope, StoreDep
from service.errors import JobNotFound, JobReportNotReady

router = APIRouter(prefix="/jobs", tags=["jobs"])

DEFAULT_JOB_LIMIT = 50
MAX_JOB_LIMIT = 1000
_JOB_ID = re.compile(r"[0-9a-f]{32}")


def _check_job_id(job_id: str) -> str:
    """A job id is 32 lowercase hex digits; anything else cannot name a job (404 without a store read)."""
    if not _JOB_ID.fullmatch(job_id):
        raise JobNotFound(job_id)
    return job_id


@router.get("", response_model=JobList, dependencies=[FitScope, StrictQuery], summary="Background fit jobs, newest first",
            responses=error_responses(401, 403, 422, 503))
async def list_jobs(
    store: StoreDep,
    segmentation: Annotated[str | None, Query(description="only the jobs of this segmentation")] = None,
    limit: Annotated[int, BeforeValidator(plain_decimal),
                     Query(ge=1, le=MAX_JOB_LIMIT, description="at most this many jobs")] = DEFAULT_JOB_LIMIT,
) -> dict[str, Any]:
    if segmentation is not None:
        check_name(segmentation)
    jobs = await anyio.to_thread.run_sync(lambda: store.jobs(segmentation, limit=limit))
    return {"jobs": jobs}


@router.get("/{job_id}", response_model=Job, dependencies=[FitScope, StrictQuery], summary="One background fit job",
            responses=error_responses(401, 403, 404, 422, 503))
async def get_job(job_id: str, store: StoreDep) -> dict[str, Any]:
    _check_job_id(job_id)
    return await anyio.to_thread.run_sync(store.job, job_id)


@router.get("/{job_id}/report", response_model=FitReport, dependencies=[FitScope, StrictQuery],
            summary="The fit report of the version a done job wrote (what the synchronous fit answers)",
            responses=error_responses(401, 403, 404, 409, 422, 503))
async def get_job_report(job_id: str, store: StoreDep) -> dict[str, Any]:
    # The fit scope that started the job reads its answer here, as a synchronous fit's caller gets it.
    _check_job_id(job_id)

    def read() -> dict[str, Any]:
        job = store.job(job_id)
        if job["state"] != "done":
            raise JobReportNotReady(job_id, job["state"])
        return store.version_report(job["segmentation"], job["version"])

    return await anyio.to_thread.run_sync(read)


@router.delete("/{job_id}", response_model=Job, dependencies=[FitScope, StrictQuery],
               summary="Cancel a queued or running job (no version is written); 409 once it has finished",
               responses=error_responses(401, 403, 404, 409, 422, 503))
async def cancel_job(job_id: str, request: Request, actor: ActorDep) -> dict[str, Any]:
    _check_job_id(job_id)
    return await request.app.state.jobs.cancel(job_id, actor=actor)
