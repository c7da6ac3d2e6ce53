from __future__ import annotations

from typing import Any

from pydantic import BaseModel, Field

from schemas.common import DATA_SHA256


class SegmentationSummary(BaseModel):
    name: str
    live_version: int | None
    latest_version: int
    created_at: str
    updated_at: str


class SegmentationList(BaseModel):
    segmentations: list[SegmentationSummary]


class VersionSummary(BaseModel):
    version: int
    created_at: str
    live: bool
    k: int
    n_records: int
    data_sha256: str = Field(description=DATA_SHA256)
    created_by: str | None = None   # the actor of the fit (a key name, 'local' or 'cli'); None before events
    engine: str | None = None       # the fit engine that ran (memory, out_of_core, dask); None before engines


class Event(BaseModel):
    """One write: when, by whom (a key name, 'local' when auth is off, 'cli' from the shell), what."""

    at: str
    actor: str
    action: str   # fit | set_live | label | delete_version | delete_segmentation
    version: int | None
    details: dict[str, Any]


class SegmentationDetail(SegmentationSummary):
    versions: list[VersionSummary]
    events: list[Event] = []   # newest first
