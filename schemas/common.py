from __future__ import annotations

from typing import Any

from pydantic import BaseModel


class ErrorItem(BaseModel):
    record: int | None = None
    field: str
    message: str


class ErrorResponse(BaseModel):
    detail: list[ErrorItem] | str | Any


# The report's and the version list's ``data_sha256`` (one description for both).
DATA_SHA256 = ("SHA-256 of the training matrix (64 hex digits); for engine dask the chunked digest 'chunks:' + 64 "
               "hex digits (docs/API.md): compare only values of the same form")
