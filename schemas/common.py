from __future__ import annotations

from typing import Any

from pydantic import BaseModel


class ErrorItem(BaseModel):
    record: int | None = None
    field: str
    message: str


class ErrorResponse(BaseModel):
    detail: list[ErrorItem] | str | Any
