from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from schemas.common import ErrorItem


class AssignRequest(BaseModel):
    """JSON form of an assign or drift body (``text/csv`` with a header row is also accepted).

    The route validates records column by column, not through this model; the model documents the shape.
    """

    records: list[dict[str, Any]] = Field(
        description="one object per record, {column: value}; the version's features must be numbers or null "
                    "(null or an absent key is a missing value); other columns are ignored (assign echoes the "
                    "id_column value)",
        min_length=1,
    )


class AssignResult(BaseModel):
    id: Any = Field(description="the id_column value (null when the record has none), or the 0-based row index "
                                "when the version has no id_column")
    segment: int = Field(description="nearest segment, 0..k-1")
    label: str | None = Field(description="the segment's label, if one was set")
    distance: float = Field(description="Euclidean distance to the segment's centroid in the clustering space "
                                        "(PCA scores, or the scaled features without PCA)")
    outlier: bool = Field(description="true when any outlier reason applies")
    outlier_reasons: list[Literal["distance", "residual"]] = Field(
        description='"distance": over the segment\'s distance threshold; "residual": PCA reconstruction error '
                    "over the version's residual threshold")
    runner_up: int | None = Field(description="second-nearest segment (null when k = 1)")
    margin: float | None = Field(description="runner-up distance minus distance (null when k = 1)")
    residual: float = Field(description="distance from the scaled record to its PCA reconstruction (0 without PCA)")
    imputed: list[str] = Field(description="features that were missing and filled with the training median")


class AssignResponse(BaseModel):
    name: str
    version: int
    results: list[AssignResult] = Field(description="one per good record, in input order")
    errors: list[ErrorItem] = Field(description="bad records skipped with on_error=skip (empty otherwise)")
