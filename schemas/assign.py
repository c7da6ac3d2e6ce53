from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from schemas.common import ErrorItem


class AssignRequest(BaseModel):
    """JSON form of an assign or drift body (``text/csv`` with a header row is also accepted)."""

    records: list[dict[str, Any]]


class AssignResult(BaseModel):
    id: Any = Field(description="the id_column value, or the 0-based row index")
    segment: int
    label: str | None
    distance: float
    outlier: bool
    outlier_reasons: list[Literal["distance", "residual"]]
    runner_up: int | None
    margin: float | None
    residual: float
    imputed: list[str]


class AssignResponse(BaseModel):
    name: str
    version: int
    results: list[AssignResult]
    errors: list[ErrorItem]
