"""Pydantic v2 models of the HTTP contract (requests and responses). No numpy types on the wire."""

from schemas.assign import AssignResponse, AssignResult
from schemas.compare import LabelSuggestion, SegmentMatch, VersionComparison
from schemas.common import ErrorItem, ErrorResponse
from schemas.drift import DriftReport, DriftReportList
from schemas.job import Job, JobList, JobState
from schemas.fit import FitReport, FitRequest, KRange, LabelUpdate, LiveUpdate, Segment
from schemas.segmentation import Event, SegmentationDetail, SegmentationList, SegmentationSummary, VersionSummary

__all__ = [
    "AssignResponse", "AssignResult", "DriftReport", "DriftReportList", "ErrorItem", "ErrorResponse", "Event",
    "FitReport", "FitRequest", "Job", "JobList", "JobState", "KRange", "LabelSuggestion", "LabelUpdate", "LiveUpdate", "Segment",
    "SegmentMatch", "SegmentationDetail", "SegmentationList", "SegmentationSummary", "VersionComparison",
    "VersionSummary",
]
