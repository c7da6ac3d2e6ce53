"""Request bodies -> Python objects or a Batch: media types, size limits, JSON (orjson) or CSV, names in paths.

Large bodies (over ``large_body_bytes``) are read by at most ``large_body_concurrency`` requests at once and
parsed in a worker thread, never on the event loop; a JSON body's records are counted on its bytes before it
is parsed, so a body of millions of tiny records is refused before it becomes millions of Python objects.
"""

from __future__ import annotations

import json
import re
from contextlib import asynccontextmanager
from typing import Any, AsyncIterator, Literal

import anyio
import numpy as np
import orjson
from fastapi import Request
from pydantic import BaseModel

from service.api.validation import printable
from service.core.frame import Batch, batch_from_frame, batch_from_json, did_you_mean, read_csv
from service.errors import (
    BadBody,
    InvalidInput,
    PayloadTooLarge,
    RecordProblem,
    UnsupportedMediaType,
)
from service.settings import Settings
from service.store import FilesystemStore, LoadedVersion

NAME_PATTERN = re.compile(r"^[a-z0-9][a-z0-9_-]{0,62}$")
CSV_TYPES = ("text/csv", "application/csv")
JSON_TYPES = ("application/json",)
BodyKind = Literal["json", "csv"]
_SURROGATE = re.compile("[\ud800-\udfff]")


def check_name(name: str) -> str:
    if not NAME_PATTERN.fullmatch(name):
        raise InvalidInput(
            f"segmentation name must match {NAME_PATTERN.pattern} (lower-case letters, digits, _ and -, "
            f"at most 63 characters); got {printable(name)!r}", field="name")
    return name


def body_kind(request: Request) -> BodyKind:
    """'json' or 'csv' from the Content-Type; anything else (text/plain, forms, none) is a 415."""
    media_type = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media_type in CSV_TYPES:
        return "csv"
    if media_type in JSON_TYPES or (media_type.startswith("application/") and media_type.endswith("+json")):
        return "json"
    raise UnsupportedMediaType(media_type)



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


@asynccontextmanager
async def large_body_slot(request: Request, settings: Settings) -> AsyncIterator[None]:
    """Hold one of the ``large_body_concurrency`` slots while a large (or unannounced) body is read and parsed.

    Excess large requests wait here, before their body is read, so at most that many large bodies (and
    their parsed forms) are in memory at once. Small bodies pass straight through.
    """
    limiter = getattr(request.app.state, "large_body_limiter", None)
    declared = request.headers.get("content-length")
    small = declared is not None and declared.isdigit() and int(declared) <= settings.large_body_bytes
    if limiter is None or small:
        yield
        return
    async with limiter:
        yield


async def off_loop_if_large(body: bytes, settings: Settings, function, *args):
    """Run ``function(*args)`` here for a small body, in a worker thread for a large one."""
    if len(body) <= settings.large_body_bytes:
        return function(*args)
    return await anyio.to_thread.run_sync(function, *args)


# --------------------------------------------------------------------------- JSON
_STRUCTURAL = np.zeros(256, dtype=bool)
_STRUCTURAL[[ord(c) for c in '"{}[],']] = True
_NON_STRUCTURAL = bytes(b for b in range(256) if b not in b'"{}[],\\')
_SCAN_CHUNK = 8 * 1024 * 1024


def count_list_items_at_depth_two(body: bytes) -> int:
    """Elements of the lists (and members of the objects) directly inside the top-level object, counted on
    the bytes: commas at nesting depth 2 outside strings, + 1. For ``{"records": [...]}`` that is the
    number of records; other top-level lists (a fit's ``features``) add their own lengths, so the count
    is an upper bound. Linear time, memory bounded by the chunk size; no Python object per record.
    """
    has_escapes = b"\\" in body
    if not has_escapes:
        # Only the structural bytes matter. Without backslashes, deleting every other byte keeps each one's
        # place relative to the quotes, and deleting two adjacent quotes (an empty string, or a closing and an
        # opening quote side by side) changes no later byte's inside/outside parity: a record of numbers
        # shrinks to "{,,,}" and the scan below touches a tenth of the body.
        body = body.translate(None, _NON_STRUCTURAL).replace(b'""', b"")
    data = np.frombuffer(body, dtype=np.uint8)
    in_string, depth, commas = 0, 0, 0
    for start in range(0, data.size, _SCAN_CHUNK):
        chunk = data[start:start + _SCAN_CHUNK]
        if has_escapes:
            positions = np.flatnonzero(_STRUCTURAL[chunk])
            chars = chunk[positions]
        else:
            chars = chunk                                   # only structural bytes are left
        quotes = chars == 34
        if has_escapes:
            # A quote preceded by an odd run of backslashes is inside a string, not a delimiter.
            for k in np.flatnonzero(quotes).tolist():
                at, run = start + int(positions[k]) - 1, 0
                while at >= 0 and data[at] == 92:
                    run, at = run + 1, at - 1
                if run % 2:
                    quotes[k] = False
        if in_string or quotes.any():
            toggles = np.cumsum(quotes, dtype=np.int32)
            outside = ~(((toggles - quotes + in_string) & 1).astype(bool)) & ~quotes
            in_string = int((in_string + toggles[-1]) & 1)
        else:                                               # no strings here: every byte is structure
            outside = np.ones(chars.size, dtype=bool)
        step = (chars == 123).view(np.int8) + (chars == 91).view(np.int8) \
            - (chars == 125).view(np.int8) - (chars == 93).view(np.int8)
        step[~outside] = 0
        levels = np.cumsum(step, dtype=np.int32)
        levels += depth
        commas += int(np.count_nonzero((chars == 44) & outside & (levels == 2)))
        if chars.size:
            depth = int(levels[-1])
    return commas + 1


def check_json_rows(body: bytes, max_rows: int, allowance: int = 0) -> None:
    """413 before parsing when a JSON body holds more records than ``max_rows`` (``allowance``: elements
    of other top-level lists that may share the count, such as a fit's feature list)."""
    if len(body) <= 2 * (max_rows + allowance):      # a record takes at least two bytes ("1,")
        return
    counted = count_list_items_at_depth_two(body)
    if counted > max_rows + allowance:
        if allowance == 0:      # only "records" may hold a list: the count is the number of records
            raise PayloadTooLarge(f"the batch has {counted} records; the limit is {max_rows}")
        raise PayloadTooLarge(f"the body holds more than {max_rows} records (counted before parsing: "
                              f"{counted} list elements); the limit is {max_rows}")


def parse_json(body: bytes) -> Any:
    """orjson first (fast); the standard parser as fallback so NaN/Infinity/1e999 reach the checks as values
    (and become 422 items naming record and field) instead of a bare 400. The fallback also accepts lone
    surrogates (orjson refuses them), which no answer or stored report could hold: those are refused here."""
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError:
        pass
    try:
        document = json.loads(body)
    except (ValueError, RecursionError) as exc:  # UnicodeDecodeError is a ValueError; RecursionError: deep nesting
        raise BadBody(f"the body is not valid JSON: {str(exc)[:200]}") from None
    _refuse_lone_surrogates(document)
    return document


def _refuse_lone_surrogates(document: Any) -> None:
    """422 naming where a string (key or value) holds a lone surrogate (invalid Unicode)."""
    problems: list[RecordProblem] = []
    top = document.items() if isinstance(document, dict) else [("records", document)]
    for key, value in top:
        if key == "records" and isinstance(value, list):
            for index, record in enumerate(value):
                items = record.items() if isinstance(record, dict) else [("", record)]
                for field, inner in items:
                    if _has_surrogate(field) or _has_surrogate(inner):
                        problems.append(RecordProblem(index, printable(field), _SURROGATE_MESSAGE))
        elif _has_surrogate(key) or _has_surrogate(value):
            problems.append(RecordProblem(None, printable(key), _SURROGATE_MESSAGE))
        if len(problems) >= 200:
            break
    if problems:
        raise InvalidInput(problems)


_SURROGATE_MESSAGE = "holds a lone UTF-16 surrogate (\\ud800-\\udfff without its pair): not valid Unicode text"


def _has_surrogate(value: Any) -> bool:
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, str):
            if _SURROGATE.search(item):
                return True
        elif isinstance(item, dict):
            stack.extend(item.keys())
            stack.extend(item.values())
        elif isinstance(item, list):
            stack.extend(item)
    return False


def records_of(document: Any, *, allowed_keys: frozenset[str] | None = frozenset({"records"})) -> list[Any]:
    """The ``records`` list of a JSON body. ``allowed_keys``: the top-level keys the route knows (None: the
    caller checks them); any other key is a 422 with a "did you mean" hint, never silently ignored."""
    if not isinstance(document, dict):
        raise InvalidInput('expected a JSON object with a "records" list', field="records")
    if allowed_keys is not None:
        unknown = [key for key in document if key not in allowed_keys]
        if unknown:
            raise InvalidInput([RecordProblem(None, printable(key), "unknown top-level key; known: "
                                              f"{sorted(allowed_keys)}{did_you_mean(key, sorted(allowed_keys))}")
                                for key in unknown])
    if "records" not in document:
        raise InvalidInput('expected a JSON object with a "records" list', field="records")
    records = document["records"]
    if not isinstance(records, list):
        raise InvalidInput('"records" must be a list of objects', field="records")
    return records


def _parse_batch(kind: BodyKind, body: bytes, features: list[str], id_column: str | None, max_rows: int) -> Batch:
    if kind == "csv":
        frame = read_csv(body, id_column, max_rows=max_rows)
        _check_rows(len(frame), max_rows)
        return batch_from_frame(frame, features, id_column)
    check_json_rows(body, max_rows)
    records = records_of(parse_json(body))
    _check_rows(len(records), max_rows)
    return batch_from_json(records, features, id_column)


async def read_batch(request: Request, features: list[str], id_column: str | None, *, settings: Settings,
                     max_rows: int) -> Batch:
    """An assign/drift body (JSON or CSV) -> Batch of the version's features."""
    kind = body_kind(request)
    async with large_body_slot(request, settings):
        body = await read_body(request, settings.max_body_bytes)
        return await off_loop_if_large(body, settings, _parse_batch, kind, body, features, id_column, max_rows)


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
                             settings: Settings, max_rows: int, echo_ids: bool) -> tuple[LoadedVersion, Batch]:
    """Resolve ``version`` (the live one by default), load it, and read the body as a Batch of its features."""
    check_name(name)
    loaded = store.load(name, store.resolve_version(name, version))
    id_column = loaded.bundle.config.id_column if echo_ids else None
    batch = await read_batch(request, list(loaded.compiled.features), id_column, settings=settings,
                             max_rows=max_rows)
    return loaded, batch
