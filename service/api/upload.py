"""Fit uploads streamed to a temporary file as they arrive (big inputs), never held whole in memory.

``fit_body_kind`` tells JSON (parsed in memory, as before) from the streamed kinds: CSV (plain or gzip-compressed:
``Content-Encoding: gzip``, or a .gz file, recognised by its first bytes) and Parquet
(``Content-Type: application/vnd.apache.parquet``). ``spool_upload`` writes the body to a file in a private
temporary directory, counting what arrives against ``max_body_bytes``; the caller removes the directory.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Literal

from fastapi import Request

from service.api.payload import body_kind
from service.errors import InvalidInput, PayloadTooLarge, UnsupportedMediaType

PARQUET_TYPES = ("application/vnd.apache.parquet", "application/x-parquet")
FitBodyKind = Literal["json", "csv", "csv-gzip", "parquet"]


def fit_body_kind(request: Request) -> FitBodyKind:
    """'json', 'csv', 'csv-gzip' (Content-Encoding: gzip; a .gz file sent as text/csv is recognised later, by its
    first bytes) or 'parquet' from the headers; anything else is a 415."""
    media_type = request.headers.get("content-type", "").split(";")[0].strip().lower()
    encoding = request.headers.get("content-encoding", "identity").strip().lower()
    kind = "parquet" if media_type in PARQUET_TYPES else body_kind(request)
    if encoding not in ("identity", "gzip") or (encoding == "gzip" and kind != "csv"):
        raise UnsupportedMediaType(f"{media_type} with Content-Encoding {encoding}; only text/csv may be "
                                   "gzip-compressed")
    return "csv-gzip" if encoding == "gzip" else kind


async def spool_upload(request: Request, limit: int, directory: Path) -> Path:
    """Write the body to ``directory``/upload as it arrives; 413 past ``limit`` bytes, 422 when empty."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(f"the body is {declared} bytes; the limit is {limit}")
    path = directory / "upload"
    size = 0
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as handle:
        async for chunk in request.stream():
            size += len(chunk)
            if size > limit:
                raise PayloadTooLarge(f"the body exceeds the limit of {limit} bytes")
            handle.write(chunk)        # to the page cache: microseconds per network chunk
    if size == 0:
        raise InvalidInput("the request body is empty", field="body")
    return path
