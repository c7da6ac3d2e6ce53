from __future__ import annotations

from pydantic import BaseModel


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
    data_sha256: str


class SegmentationDetail(SegmentationSummary):
    versions: list[VersionSummary]
