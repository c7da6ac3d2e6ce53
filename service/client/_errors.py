"""Errors the client raises. Catch ``SegscoreError`` for all of them.

    SegscoreError
    ├── ServerUnreachable        no answer: connection refused, DNS failure, timeout, broken connection
    ├── UnexpectedResponse       a 2xx answer whose body is not the JSON the contract promises
    ├── ApiError                 the server answered 4xx or 5xx; ``status`` and ``detail`` as it sent them
    │   ├── BadRequest           400  body is not valid JSON or CSV
    │   ├── Unauthorized         401  no or unknown API key
    │   ├── Forbidden            403  the key lacks the endpoint's scope
    │   ├── NotFound             404  unknown segmentation, version or segment
    │   ├── BodyTimeout          408  the request body stopped arriving before the server's time limit
    │   ├── Conflict             409  e.g. no live version
    │   ├── PayloadTooLarge      413  body or row count over the server's limit
    │   ├── UnsupportedMediaType 415  the body is neither JSON nor CSV (by its Content-Type)
    │   ├── InvalidInput         422  valid JSON/CSV whose content cannot be used (items name record and field)
    │   └── ServerError          5xx
    ├── JobFailed                a background fit ended failed or cancelled; ``job`` and its ``detail``
    └── LocalInputError          a problem found before anything was sent (a file, a column name, an argument)
        └── BadFile              a CSV file that cannot be used: ``problem`` is file, gzip, encoding, empty,
                                 header, delimiter or column; ``line`` and ``column`` say where

A command line sitting on this client maps ``ApiError`` and ``ServerUnreachable`` to "the server refused or
could not be reached" and ``LocalInputError`` to "a usage or local file problem".
"""

from __future__ import annotations

from typing import Any


class SegscoreError(Exception):
    """Base of every error this client raises on purpose."""


class ServerUnreachable(SegscoreError):
    """The server could not be reached or the connection failed."""

    def __init__(self, url: str, cause: Exception) -> None:
        self.url = url
        self.cause = cause
        reason = str(cause) or type(cause).__name__
        super().__init__(f"no answer from {url}: {reason} (is the server running, and is the URL right?)")


class UnexpectedResponse(SegscoreError):
    """A successful status with a body that is not the expected JSON (a proxy's page, say)."""

    def __init__(self, status: int, content_type: str) -> None:
        self.status = status
        super().__init__(f"the server answered {status} with {content_type or 'no content type'}, not JSON; "
                         "is the URL that of a segscore server?")


class JobFailed(SegscoreError):
    """A background fit job ended without a version: failed (``detail`` is what a synchronous fit would have
    answered) or cancelled."""

    def __init__(self, job: dict[str, Any]) -> None:
        self.job = job
        self.state = job.get("state")
        self.detail = job.get("error") if self.state == "failed" else "the job was cancelled; no version was written"
        lines = "; ".join(detail_lines(self.detail))
        super().__init__(f"background fit job {job.get('id')} of '{job.get('segmentation')}' is {self.state}: {lines}")


def detail_lines(detail: Any) -> list[str]:
    """The server's ``detail``, one problem a line: a string as is, 422 items as 'record 3, field x: message'."""
    if not isinstance(detail, list):
        return [str(detail)]
    lines = []
    for item in detail:
        if isinstance(item, dict):
            where = ", ".join(f"{key} {item[key]}" for key in ("record", "field") if item.get(key) not in (None, ""))
            lines.append(f"{where}: {item.get('message', '')}" if where else str(item.get("message", item)))
        else:
            lines.append(str(item))
    return lines


def _describe(detail: Any) -> str:
    """The server's ``detail`` in one line (the first five problems)."""
    lines = detail_lines(detail)
    more = f" (and {len(lines) - 5} more)" if len(lines) > 5 else ""
    return "; ".join(lines[:5]) + more


class ApiError(SegscoreError):
    """The server refused the request: ``status`` is the HTTP status, ``detail`` the body's ``detail``."""

    def __init__(self, status: int, detail: Any, *, method: str = "", path: str = "") -> None:
        self.status = status
        self.detail = detail
        self.method = method
        self.path = path
        where = f" ({method} {path})" if method else ""
        super().__init__(f"{status}{where}: {_describe(detail)}")

    def __repr__(self) -> str:
        return f"{type(self).__name__}(status={self.status}, detail={self.detail!r})"


class BadRequest(ApiError):
    """400: the body is not valid JSON or CSV."""


class Unauthorized(ApiError):
    """401: no API key, or an unknown one."""


class Forbidden(ApiError):
    """403: the API key lacks the scope this endpoint needs."""


class NotFound(ApiError):
    """404: unknown segmentation, version or segment."""


class BodyTimeout(ApiError):
    """408: the request body stopped arriving; the server closed the connection."""


class Conflict(ApiError):
    """409: the request conflicts with the current state (e.g. no live version)."""


class PayloadTooLarge(ApiError):
    """413: the body or its row count is over the server's limit."""


class UnsupportedMediaType(ApiError):
    """415: the body's Content-Type is neither JSON nor CSV."""


class InvalidInput(ApiError):
    """422: valid JSON/CSV whose content cannot be used; ``detail`` items name the record and field."""


class ServerError(ApiError):
    """5xx: the server failed; its log says why."""


class LocalInputError(SegscoreError):
    """A problem found before anything was sent: an unreadable file, a column clash, a bad argument."""


class BadFile(LocalInputError):
    """A local CSV file that cannot be used; the message names the file, the line or column, and the problem."""

    def __init__(self, path: Any, problem: str, message: str, *, line: int | None = None,
                 column: str | None = None) -> None:
        self.path, self.problem, self.line, self.column = path, problem, line, column
        where = "".join(f", {part}" for part in (f"line {line}" if line is not None else "",
                                                  f"column {column!r}" if column is not None else "") if part)
        super().__init__(f"{path}{where}: {problem}: {message}")


ERROR_BY_STATUS: dict[int, type[ApiError]] = {
    400: BadRequest, 401: Unauthorized, 403: Forbidden, 404: NotFound, 408: BodyTimeout, 409: Conflict,
    413: PayloadTooLarge, 415: UnsupportedMediaType, 422: InvalidInput,
}


def api_error(status: int, detail: Any, *, method: str = "", path: str = "") -> ApiError:
    """The most specific ApiError class for ``status``."""
    cls = ERROR_BY_STATUS.get(status, ServerError if status >= 500 else ApiError)
    return cls(status, detail, method=method, path=path)
