"""Request bodies -> Python objects or a Batch: media types, size limits, JSON (orjson), CSV or Arrow (assign
and drift only), names in paths; and which answer format a request accepts (JSON or Arrow).

Large bodies (over ``large_body_bytes``) are read by at most ``large_body_concurrency`` requests at once and
parsed in a worker thread, never on the event loop; a JSON body's records are counted on its bytes before it
is parsed, so a body of millions of tiny records is refused before it becomes millions of Python objects.
"""

from __future__ import annotations

from contextlib import asynccontextmanager
from typing import Any, AsyncIterator, Literal

import anyio
import numpy as np
import orjson
from fastapi import Request
from pydantic import BaseModel
from starlette.requests import ClientDisconnect

from service.core.frame import Batch, PlainRecord, batch_from_frame, batch_from_json, plain_record, read_csv
from service.errors import (
    InvalidInput,
    PayloadTooLarge,
    RecordProblem,
    UnsupportedMediaType,
)
from service.inputs.arrow_batch import ARROW_STREAM_TYPE, batch_from_arrow, read_arrow_stream

# The body checks live in service.inputs (shared with the CLI); re-exported for the routes.
from service.inputs.checks import (  # noqa: F401
    NAME_PATTERN,
    check_json_rows,
    check_name,
    count_list_items_at_depth_two,
    parse_json,
    records_of,
)
from service.middleware import receive_one_within
from service.settings import Settings
from service.store import BundleStore, LoadedVersion

CSV_TYPES = ("text/csv", "application/csv")
JSON_TYPES = ("application/json",)
BodyKind = Literal["json", "csv", "arrow"]
VARY_ACCEPT = {"Vary": "Accept"}      # headers of an answer whose format follows the request's Accept


def body_kind(request: Request, *, arrow: bool = False) -> BodyKind:
    """'json' or 'csv' (or, with ``arrow``, 'arrow') from the Content-Type; anything else (text/plain, forms,
    none) is a 415."""
    return kind_of_content_type(request.headers.get("content-type", ""), arrow=arrow)


def kind_of_content_type(content_type: str, *, arrow: bool = False) -> BodyKind:
    """``body_kind`` of a Content-Type header's value."""
    media_type = content_type.split(";")[0].strip().lower()
    if media_type in CSV_TYPES:
        return "csv"
    if media_type in JSON_TYPES or (media_type.startswith("application/") and media_type.endswith("+json")):
        return "json"
    if arrow and media_type == ARROW_STREAM_TYPE:
        return "arrow"
    raise UnsupportedMediaType(media_type, also=(ARROW_STREAM_TYPE,) if arrow else ())


def _accept_ranges(accept: str) -> list[tuple[str, float]]:
    """An Accept header's media ranges with their q values (RFC 9110 section 12.5.1); a bad q counts as 0."""
    ranges = []
    for item in accept.split(","):
        media_type, *params = item.split(";")
        q = 1.0
        for param in params:
            key, _, value = param.strip().partition("=")
            if key.strip().lower() == "q":
                try:
                    q = float(value)
                except ValueError:
                    q = 0.0
        ranges.append((media_type.strip().lower(), q))
    return ranges


def wants_arrow(request: Request) -> bool:
    """True when the request's Accept names the Arrow stream type at least as high as JSON (by name or by a
    wildcard): ``Accept: application/vnd.apache.arrow.stream``. Every other Accept (none, */*, JSON, or a
    type we cannot produce) gets JSON: RFC 9110 section 12.5.1 lets a server disregard Accept rather than
    answer 406, and an answer's Content-Type always says which format it is."""
    return accepts_arrow(request.headers.get("accept", ""))


def accepts_arrow(accept: str) -> bool:
    """``wants_arrow`` of an Accept header's value."""
    accept = accept.lower()
    if "arrow" not in accept:              # the common case, decided without parsing
        return False
    arrow_q, json_q = 0.0, 0.0
    for media_type, q in _accept_ranges(accept):
        if media_type == ARROW_STREAM_TYPE:
            arrow_q = max(arrow_q, q)
        elif media_type in ("application/json", "application/*", "*/*"):
            json_q = max(json_q, q)
    return arrow_q > 0 and arrow_q >= json_q


def refuse_declared_length(declared: str | None, limit: int) -> None:
    """413 before reading when the Content-Length announces more than ``limit`` bytes."""
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(f"the body is {declared} bytes; the limit is {limit}")


async def read_body(request: Request, limit: int) -> bytes:
    refuse_declared_length(request.headers.get("content-length"), limit)
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise _over_limit(limit)
        chunks.append(chunk)
    return _non_empty(b"".join(chunks))


async def receive_within(receive, limit: int, seconds: float) -> bytes:
    """``read_body`` for a caller without a Request (the assign lane), with the body time limit of
    ``BodyReadTimeout``: the body straight from ASGI ``receive`` calls (what ``Request.stream`` reads), at most
    ``limit`` bytes, each call bounded by ``seconds`` (``receive_one_within``), with the same checks; a client
    that disconnects first ends it with ClientDisconnect, as there. One plain loop: no wrapper around
    ``receive`` and no async generator (either costs more than reading a small body)."""
    chunks, size = [], 0
    while True:
        message = await receive_one_within(receive, seconds)
        kind = message["type"]
        if kind == "http.request":
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > limit:
                raise _over_limit(limit)
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        elif kind == "http.disconnect":
            raise ClientDisconnect()
    return _non_empty(chunks[0] if len(chunks) == 1 else b"".join(chunks))


def _over_limit(limit: int) -> PayloadTooLarge:
    return PayloadTooLarge(f"the body exceeds the limit of {limit} bytes")


def _non_empty(body: bytes) -> bytes:
    if not body.strip():
        raise InvalidInput("the request body is empty", field="body")
    return body


def declared_small(request: Request, settings: Settings) -> bool:
    """Whether the request announces a body of at most ``large_body_bytes`` (read without a slot)."""
    return length_is_small(request.headers.get("content-length"), settings)


def length_is_small(declared: str | None, settings: Settings) -> bool:
    """``declared_small`` of a Content-Length header's value."""
    return declared is not None and declared.isdigit() and int(declared) <= settings.large_body_bytes


@asynccontextmanager
async def large_body_slot(request: Request, settings: Settings) -> AsyncIterator[None]:
    """Hold one of the ``large_body_concurrency`` slots while a large (or unannounced) body is read and parsed.

    Excess large requests wait here, before their body is read, so at most that many large bodies (and
    their parsed forms) are in memory at once. Small bodies pass straight through.
    """
    limiter = getattr(request.app.state, "large_body_limiter", None)
    if limiter is None or declared_small(request, settings):
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
def parse_batch(kind: BodyKind, body: bytes, features: list[str], id_column: str | None, max_rows: int) -> Batch:
    if kind == "arrow":
        table = read_arrow_stream(body, max_rows)
        _check_rows(table.num_rows, max_rows)
        return batch_from_arrow(table, features, id_column)
    if kind == "csv":
        frame = read_csv(body, id_column, max_rows=max_rows)
        _check_rows(len(frame), max_rows)
        return batch_from_frame(frame, features, id_column)
    check_json_rows(body, max_rows)
    records = records_of(parse_json(body))
    _check_rows(len(records), max_rows)
    return batch_from_json(records, features, id_column)


def plain_single_record(body: bytes, features: list[str], id_column: str | None) -> PlainRecord | None:
    """The record of a JSON body that is ``{"records": [one record]}`` whose record holds every feature as a plain
    number or null and, if it has one, a usable id (``plain_record``), parsed once; None for any other body,
    which ``parse_batch`` then reads and checks in full (so its answers and errors are the same)."""
    try:
        document = orjson.loads(body)
    except orjson.JSONDecodeError:
        return None
    if type(document) is not dict or len(document) != 1:
        return None
    records = document.get("records")
    if type(records) is not list or len(records) != 1 or type(records[0]) is not dict:
        return None
    return plain_record(records[0], features, id_column)


async def read_batch(request: Request, features: list[str], id_column: str | None, *, settings: Settings,
                     max_rows: int) -> Batch:
    """An assign/drift body (JSON, CSV or Arrow) -> Batch of the version's features."""
    kind = body_kind(request, arrow=True)
    if declared_small(request, settings):
        # A small body (the single-record call): read and parsed here, without a slot or a context manager.
        body = await read_body(request, settings.max_body_bytes)
        return await off_loop_if_large(body, settings, parse_batch, kind, body, features, id_column, max_rows)
    async with large_body_slot(request, settings):
        body = await read_body(request, settings.max_body_bytes)
        return await off_loop_if_large(body, settings, parse_batch, kind, body, features, id_column, max_rows)


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
    if not batch.may_have_nan:
        return
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


def request_body_openapi(model: type[BaseModel], csv_description: str, *, arrow: bool = False,
                         answer: type[BaseModel] | None = None) -> dict[str, Any]:
    """``openapi_extra`` for a route that reads its body itself: the JSON model, or CSV text; with ``arrow``
    also an Arrow IPC stream body, and an Arrow answer (of ``answer``'s fields) beside the JSON one."""
    content: dict[str, Any] = {
        "application/json": {"schema": model.model_json_schema(ref_template="#/components/schemas/{model}")},
        "text/csv": {"schema": {"type": "string", "description": csv_description}},
    }
    extra: dict[str, Any] = {"requestBody": {"required": True, "content": content}}
    if arrow:
        content[ARROW_STREAM_TYPE] = {"schema": {
            "type": "string", "format": "binary",
            "description": "Arrow IPC stream: one column per feature (integer, floating point or decimal; null = "
                           "missing), the id column (integers or strings) if the version has one"}}
        shape = answer.__name__ if answer is not None else "the JSON answer"
        extra["responses"] = {"200": {"content": {ARROW_STREAM_TYPE: {"schema": {
            "type": "string", "format": "binary",
            "description": f"with 'Accept: {ARROW_STREAM_TYPE}': {shape} as an Arrow IPC stream (see docs/API.md)"}}}}}
    return extra


async def read_version_batch(request: Request, store: BundleStore, name: str, version: int | None, *,
                             settings: Settings, max_rows: int,
                             echo_ids: bool) -> tuple[LoadedVersion, dict[int, str], Batch]:
    """Resolve ``version`` (the live one by default) and its labels (from memory once served; else read in a
    worker thread), and read the body as a Batch of its features."""
    check_name(name)
    loaded, labels = await store.serving(name, version)
    id_column = loaded.bundle.config.id_column if echo_ids else None
    batch = await read_batch(request, list(loaded.compiled.features), id_column, settings=settings,
                             max_rows=max_rows)
    return loaded, labels, batch
