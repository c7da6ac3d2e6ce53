"""pydantic ValidationError -> the contract's 422 items; strict numbers in paths and queries; unknown query
parameters refused."""

from __future__ import annotations

import re
from typing import Annotated, Any, Iterable

from fastapi import Depends, Request
from pydantic import BaseModel, BeforeValidator, Field, ValidationError

from schemas.common import ErrorResponse
from service.core.frame import did_you_mean
from service.errors import InvalidInput, RecordProblem


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


def body_model_keys(route: Any) -> list[str]:
    """The fields of a route's JSON body model (for hints on unknown keys), or []."""
    body = getattr(route, "body_field", None)
    model = getattr(getattr(body, "field_info", None), "annotation", None)
    return list(getattr(model, "model_fields", {}))


def validate_model(model: type[BaseModel], data: Any) -> Any:
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InvalidInput(problems_from_pydantic(exc.errors(), known_keys=model.model_fields)) from None


# --------------------------------------------------------------------------- numbers in paths and queries
MAX_VERSION = 2 ** 31 - 1
_PLAIN_DECIMAL = re.compile(r"[1-9][0-9]{0,9}|0")


def plain_decimal(value: Any) -> Any:
    """Only plain decimal digits are a number in a path or query: '1.0', '+1', ' 1' and '1e3' are refused
    (int() and pydantic's lax mode would read them all as numbers)."""
    if isinstance(value, str):
        if not _PLAIN_DECIMAL.fullmatch(value):
            raise ValueError(f"expected a plain decimal integer (digits only); got {printable(value[:40])!r}")
        return int(value)
    return value


# A version number, 1..2**31-1, in a path or a query string (larger numbers would overflow the store index).
VersionNumber = Annotated[int, BeforeValidator(plain_decimal), Field(ge=1, le=MAX_VERSION)]
# A segment id, 0..2**31-1, in a path.
SegmentNumber = Annotated[int, BeforeValidator(plain_decimal), Field(ge=0, le=MAX_VERSION)]


# --------------------------------------------------------------------------- unknown query parameters
def _known_query_names(route: Any) -> frozenset[str]:
    known = getattr(route, "_known_query_names", None)
    if known is None:
        names: set[str] = set()
        stack = [route.dependant]
        while stack:                    # the route's own query parameters and those of its dependencies
            dependant = stack.pop()
            names.update(param.alias for param in dependant.query_params)
            stack.extend(dependant.dependencies)
        for param in (getattr(route, "openapi_extra", None) or {}).get("parameters", []):
            if param.get("in") == "query":
                names.add(param["name"])
        known = frozenset(names)
        route._known_query_names = known
    return known


async def reject_unknown_query(request: Request) -> None:
    """Dependency: a query parameter the route does not know is a 422 (with a "did you mean" hint), so a
    misspelt option (``?verison=1``) is never silently replaced by its default."""
    if not request.query_params:
        return
    known = _known_query_names(request.scope["route"])
    unknown = [key for key in dict.fromkeys(request.query_params.keys()) if key not in known]
    if unknown:
        raise InvalidInput([unknown_query_problem(key, known) for key in unknown])


def unknown_query_problem(key: str, known: Iterable[str]) -> RecordProblem:
    known = sorted(known)
    hint = did_you_mean(key, known)
    listed = f"known: {known}" if known else "this route takes no query parameters"
    return RecordProblem(None, printable(key), f"unknown query parameter; {listed}{hint}")


StrictQuery = Depends(reject_unknown_query)


# --------------------------------------------------------------------------- documented error answers
_ERROR_MEANINGS = {
    400: "the body is not valid JSON or CSV",
    401: "no API key, or an unknown one",
    403: "the API key lacks the route's scope",
    404: "unknown segmentation, version or segment",
    409: "conflicting state (no live version to use)",
    413: "body or batch over the configured limit",
    415: "Content-Type neither application/json nor text/csv",
    422: "valid JSON/CSV with unusable content, shape or values; each item names the record and field",
    500: "internal error (never a stack trace), or a stored artifact that fails its SHA-256 check",
    503: "the store cannot be read or written",
}


def error_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """``responses=`` for a route: each status with the ErrorResponse schema and what it means here."""
    return {status: {"model": ErrorResponse, "description": _ERROR_MEANINGS[status]} for status in statuses}

