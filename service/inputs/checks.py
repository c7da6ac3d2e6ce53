"""Checks of names, JSON bodies and parameter models that the routes and the CLI share (no web imports).

Large bodies are counted on their bytes before they are parsed, so a body of millions of tiny records is refused
before it becomes millions of Python objects.
"""

from __future__ import annotations

import json
import re
from typing import Any, Iterable

import numpy as np
import orjson
from pydantic import BaseModel, ValidationError

from service.core.frame import did_you_mean
from service.errors import BadBody, InvalidInput, PayloadTooLarge, RecordProblem

NAME_PATTERN = re.compile(r"^[a-z0-9][a-z0-9_-]{0,62}$")
_SURROGATE = re.compile("[\ud800-\udfff]")


def printable(text: str) -> str:
    """``text`` safe to put in a JSON answer: a lone surrogate shown as its escape."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


_UNION_TAGS = frozenset({"int", "float", "bool", "str", "none", "KRange", "list[str]"})


def problems_from_pydantic(errors: Iterable[dict[str, Any]], skip_prefix: tuple[str, ...] = (),
                           known_keys: Iterable[str] = ()) -> list[RecordProblem]:
    """``known_keys``: the body model's fields, for a "did you mean" hint on an unknown key."""
    known = sorted(known_keys)
    problems = []
    for error in errors:
        # Drop pydantic's internal location parts (union member tags such as "int" or
        # "function-after[...]") so that the field reads as the client wrote it: "k", "k.min".
        loc = [printable(str(part)) for part in error.get("loc", ())
               if str(part) not in skip_prefix and "[" not in str(part) and str(part) not in _UNION_TAGS]
        message = error.get("msg", "invalid value")
        if error.get("type") == "extra_forbidden" and loc and known:
            message = f"unknown key; known: {known}{did_you_mean(loc[-1], known)}"
        problems.append(RecordProblem(None, ".".join(loc) or "body", message))
    return problems


def validate_model(model: type[BaseModel], data: Any) -> Any:
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InvalidInput(problems_from_pydantic(exc.errors(), known_keys=model.model_fields)) from None


# --------------------------------------------------------------------------- numbers in paths and queries
def unknown_query_problem(key: str, known: Iterable[str]) -> RecordProblem:
    known = sorted(known)
    hint = did_you_mean(key, known)
    listed = f"known: {known}" if known else "this route takes no query parameters"
    return RecordProblem(None, printable(key), f"unknown query parameter; {listed}{hint}")


def check_name(name: str) -> str:
    if not NAME_PATTERN.fullmatch(name):
        raise InvalidInput(
            f"segmentation name must match {NAME_PATTERN.pattern} (lower-case letters, digits, _ and -, "
            f"at most 63 characters); got {printable(name)!r}", field="name")
    return name


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


