"""Background fit jobs (``POST .../fit?background=true``, ``/v1/jobs``)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from schemas.common import ErrorItem

JobState = Literal["queued", "running", "done", "failed", "cancelled"]


class Job(BaseModel):
    id: str
    segmentation: str
    state: JobState
    step: str = Field(description="reading, scaling, reducing, 'clustering k=N', profiling or saving")
    progress: float = Field(ge=0, le=1, description="0..1, never decreasing; 1 only when done")
    version: int | None = Field(description="the version the job wrote (state 'done')")
    error: list[ErrorItem] | str | Any | None = Field(
        description="state 'failed': the 'detail' a synchronous fit of the same request would have answered")
    created_at: str
    updated_at: str


class JobList(BaseModel):
    jobs: list[Job]
