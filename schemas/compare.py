from __future__ import annotations

from pydantic import BaseModel, Field


class SegmentMatch(BaseModel):
    id: int = Field(description="segment id in its own version")
    label: str | None = Field(description="the segment's current label, if one was set")
    size: int = Field(description="rows of the compared sample the version assigns to this segment")
    best_match: int | None = Field(description="the other version's segment holding most of these rows (ties: "
                                               "the lower id); null when the segment holds no row of the sample")
    share: float | None = Field(description="share of this segment's rows that the best match holds")


class LabelSuggestion(BaseModel):
    segment: int = Field(description="segment of the 'to' version that would get the label")
    label: str = Field(description="label of from_segment in the 'from' version")
    from_segment: int
    from_share: float = Field(description="share of from_segment's rows that land in segment")
    to_share: float = Field(description="share of segment's rows that come from from_segment")
    current_label: str | None = Field(description="the label segment has now in the 'to' version")


class VersionComparison(BaseModel):
    name: str
    from_version: int = Field(description="v in .../versions/{v}/compare/{w}: the version whose labels are carried")
    to_version: int = Field(description="w: the version the labels are suggested for")
    sample_version: int = Field(description="the newer of the two: its stored training sample is what both assign")
    n_records: int = Field(description="rows of the sample (missing values imputed by each version's medians)")
    features: list[str]
    adjusted_rand_index: float = Field(description="agreement of the two assignments, 1 = same partition up to "
                                                   "renaming, about 0 = unrelated (Hubert & Arabie, 1985)")
    contingency: list[list[int]] = Field(description="rows: the 'from' version's segments 0..k-1; columns: the "
                                                     "'to' version's; cell: rows of the sample in both")
    from_segments: list[SegmentMatch] = Field(description="each 'from' segment's best match among 'to' segments")
    to_segments: list[SegmentMatch] = Field(description="each 'to' segment's best match among 'from' segments")
    min_share: float = Field(description="a label is suggested when both overlap shares are at least this")
    suggestions: list[LabelSuggestion] = Field(description="labelled 'from' segments with a clear match, by segment")
