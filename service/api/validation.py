"""pydantic ValidationError -> the contract's 422 items; strict numbers in paths and queries; unknown query
parameters refused."""

from __future__ import annotations

import re
from typing import Annotated, Any

from fastapi import Depends, Request
from pydantic import BeforeValidator, Field

from schemas.common import ErrorResponse
from service.errors import InvalidInput
# Shared with the CLI (service.inputs has no web imports); re-exported for the routes.
from service.inputs.checks import (  # noqa: F401
    printable,
    problems_from_pydantic,
    unknown_query_problem,
    validate_model,
)



def body_model_keys(route: Any) -> list[str]:
    """The fields of a route's JSON body model (for hints on unknown keys), or []."""
    body = getattr(route, "body_field", None)
    model = getattr(getattr(body, "field_info", None), "annotation", None)
    return list(getattr(model, "model_fields", {}))


MAX_VERSION = 2 ** 31 - 1
PLAIN_DECIMAL = re.compile(r"[1-9][0-9]{0,9}|0")


def plain_decimal(value: Any) -> Any:
    """Only plain decimal digits are a number in a path or query: '1.0', '+1', ' 1' and '1e3' are refused
    (int() and pydantic's lax mode would read them all as numbers)."""
    if isinstance(value, str):
        if not PLAIN_DECIMAL.fullmatch(value):
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

