"""Request bodies -> Python objects or a Batch: size limits, JSON (orjson) or CSV, names in paths."""

from __future__ import annotations

import json
import re
from typing import Any

import numpy as np
import orjson
from fastapi import Request
from pydantic import BaseModel

from service.core.frame import Batch, batch_from_frame, batch_from_json, read_csv
from service.store import FilesystemStore, LoadedVersion
from service.errors import BadBody, InvalidInput, PayloadTooLarge, RecordProblem

NAME_PATTERN = re.compile(r"^[a-z0-9][a-z0-9_-]{0,62}$")
CSV_TYPES = ("text/csv", "application/csv")


def check_name(name: str) -> str:
    if not NAME_PATTERN.fullmatch(name):
        raise InvalidInput(
            f"segmentation name must match {NAME_PATTERN.pattern} (lower-case letters, digits, _ and -, "
            f"at most 63 characters); got {name!r}", field="name")
    return name


def is_csv(request: Request) -> bool:
    return request.headers.get("content-type", "").split(";")[0].strip().lower() in CSV_TYPES


async def read_body(request: Request, limit: int) -> bytes:
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(f"the body is {declared} bytes; the limit is {limit}")
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise PayloadTooLarge(f"the body exceeds the limit of {limit} bytes")
        chunks.append(chunk)
    body = b"".join(chunks)
    if not body.strip():
        raise InvalidInput("the request body is empty", field="body")
    return body


def parse_json(body: bytes) -> Any:
    """orjson first (fast); the standard parser as fallback so NaN/Infinity/1e999 reach the checks as values
    (and become 422 items naming record and field) instead of a bare 400."""
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError:
        pass
    try:
        return json.loads(body)
    except (ValueError, RecursionError) as exc:  # UnicodeDecodeError is a ValueError; RecursionError: deep nesting
        raise BadBody(f"the body is not valid JSON: {str(exc)[:200]}") from None


def records_of(document: Any) -> list[Any]:
    if not isinstance(document, dict) or "records" not in document:
        raise InvalidInput('expected a JSON object with a "records" list', field="records")
    records = document["records"]
    if not isinstance(records, list):
        raise InvalidInput('"records" must be a list of objects', field="records")
    return records


async def read_batch(request: Request, features: list[str], id_column: str | None, *, max_body: int,
                     max_rows: int) -> Batch:
    """An assign/drift body (JSON or CSV) -> Batch of the version's features."""
    body = await read_body(request, max_body)
    if is_csv(request):
        frame = read_csv(body)
        n_rows = len(frame)
        _check_rows(n_rows, max_rows)
        return batch_from_frame(frame, features, id_column)
    records = records_of(parse_json(body))
    _check_rows(len(records), max_rows)
    return batch_from_json(records, features, id_column)


def _check_rows(n_rows: int, max_rows: int) -> None:
    if n_rows == 0:
        raise InvalidInput("the batch has no records", field="records")
    if n_rows > max_rows:
        raise PayloadTooLarge(f"the batch has {n_rows} records; the limit is {max_rows}")


def too_many_missing(batch: Batch, features: list[str]) -> None:
    """Mark records missing more than half of the features as problems (in place).

    A value already reported as bad is NaN in the matrix but not *missing*, and a record already reported
    as a whole (not an object) gets no second item.
    """
    missing = np.isnan(batch.values).sum(axis=1)
    if batch.problems:
        names = set(features)
        for problem in batch.problems:
            if problem.record is None:
                continue
            if problem.field in names:
                missing[problem.record] -= 1
            else:
                missing[problem.record] = 0
    half = len(features) / 2
    added = [RecordProblem(int(i), "", f"{int(missing[i])} of {len(features)} features are missing; at most half may be")
             for i in np.flatnonzero(missing > half)]
    if added:
        batch.problems.extend(added)
        batch.problems.sort(key=lambda p: (p.record if p.record is not None else -1))


def request_body_openapi(model: type[BaseModel], csv_description: str) -> dict[str, Any]:
    """``openapi_extra`` for a route that reads its body itself: the JSON model, or CSV text."""
    return {
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {"schema": model.model_json_schema(ref_template="#/components/schemas/{model}")},
                "text/csv": {"schema": {"type": "string", "description": csv_description}},
            },
        }
    }


async def read_version_batch(request: Request, store: FilesystemStore, name: str, version: int | None, *,
                             max_body: int, max_rows: int, echo_ids: bool) -> tuple[LoadedVersion, Batch]:
    """Resolve ``version`` (the live one by default), load it, and read the body as a Batch of its features."""
    check_name(name)
    loaded = store.load(name, store.resolve_version(name, version))
    id_column = loaded.bundle.config.id_column if echo_ids else None
    batch = await read_batch(request, list(loaded.compiled.features), id_column, max_body=max_body,
                             max_rows=max_rows)
    return loaded, batch
