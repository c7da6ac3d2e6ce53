"""Errors the service raises on purpose. ``service.app`` alone maps each class to an HTTP status.

    ServiceError
    ├── BadBody                  body is not valid JSON or CSV
    ├── AuthError
    │   ├── MissingKey           no or unknown API key
    │   └── ScopeDenied          key lacks the scope
    ├── NotFound
    │   ├── SegmentationNotFound
    │   ├── VersionNotFound
    │   ├── SegmentNotFound
    │   └── KeyNotFound          no API key of that name (keys revoke)
    │   ├── ChartNotFound
    │   └── DriftReportNotFound
    ├── Conflict
    │   ├── NoLiveVersion
    │   └── KeyNameTaken         an API key of that name exists
    ├── BodyTimeout              the client stopped sending its body
    ├── PayloadTooLarge
    ├── UnsupportedMediaType     body neither JSON nor CSV
    ├── InvalidInput             well-formed body, unusable content
    │   ├── InvalidRecords       per-record problems (index and field)
    │   └── FeatureMismatch      columns the version needs are absent
    ├── FitTimeLimit             a fit ran past SEGSCORE_FIT_TIME_LIMIT_SECONDS; its worker was stopped
    ├── FitWorkerDied            the worker process of a fit ended without an answer (killed, out of memory)
    ├── SourceForbidden          a fit's data source lies outside SEGSCORE_SOURCE_PREFIXES (or none is set)
    ├── FitCancelled             the fit was cancelled; its cluster work was stopped and nothing was written
    ├── ClusterUnavailable       the Dask scheduler is unreachable or was lost during a fit
    ├── BundleCorrupt            stored artifact missing, fails its SHA-256 check, or unreadable
    └── StoreUnavailable
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


class ServiceError(Exception):
    """Base of every deliberate error; ``detail`` is what the client sees."""

    def __init__(self, detail: Any = None) -> None:
        self.detail = detail if detail is not None else (self.__doc__ or "").strip()
        super().__init__(self.detail)

    def __repr__(self) -> str:
        return f"{type(self).__name__}(detail={self.detail!r})"


class BadBody(ServiceError):
    """The request body is not valid JSON or CSV."""


class AuthError(ServiceError):
    """Authentication failed."""


class MissingKey(AuthError):
    """No API key, or an unknown one; send 'Authorization: Bearer <key>'."""


class ScopeDenied(AuthError):
    """The API key lacks the scope this endpoint needs."""

    def __init__(self, scope: str) -> None:
        super().__init__(f"this API key lacks the '{scope}' scope")


class NotFound(ServiceError):
    """Not found."""


class SegmentationNotFound(NotFound):
    """No such segmentation."""

    def __init__(self, name: str) -> None:
        super().__init__(f"segmentation '{name}' does not exist")


class VersionNotFound(NotFound):
    """No such version."""

    def __init__(self, name: str, version: int) -> None:
        super().__init__(f"segmentation '{name}' has no version {version}")


class SegmentNotFound(NotFound):
    """No such segment."""

    def __init__(self, name: str, version: int, segment: int, k: int) -> None:
        super().__init__(f"'{name}' version {version} has segments 0..{k - 1}; got {segment}")


class KeyNotFound(NotFound):
    """No API key of that name."""

    def __init__(self, name: str) -> None:
        super().__init__(f"there is no API key named '{name}'")
class ChartNotFound(NotFound):
    """No such chart."""

    def __init__(self, chart: str, known: tuple[str, ...]) -> None:
        super().__init__(f"no chart named {chart[:40]!r}; charts of a version: {', '.join(known)}")


class DriftReportNotFound(NotFound):
    """No such drift report."""

    def __init__(self, name: str, report_id: str) -> None:
        super().__init__(f"segmentation '{name}' has no stored drift report {report_id!r}")


class Conflict(ServiceError):
    """The request conflicts with the current state."""


class NoLiveVersion(Conflict):
    """No live version; name one with ?version= or make one live."""

    def __init__(self, name: str) -> None:
        super().__init__(
            f"segmentation '{name}' has no live version; pass ?version=N or PUT .../live first"
        )


class KeyNameTaken(Conflict):
    """An API key of that name exists."""

    def __init__(self, name: str) -> None:
        super().__init__(f"an API key named '{name}' exists; revoke it first or choose another name")


class BodyTimeout(ServiceError):
    """The client stopped sending the request body."""

    def __init__(self, seconds: float) -> None:
        super().__init__(f"no part of the request body arrived for {seconds:g} s; the connection is closed")


class PayloadTooLarge(ServiceError):
    """The request is larger than the configured limit."""


class UnsupportedMediaType(ServiceError):
    """The body must be JSON ('Content-Type: application/json') or CSV ('Content-Type: text/csv')."""

    def __init__(self, content_type: str) -> None:
        shown = repr(content_type) if content_type else "none"
        super().__init__(f"unsupported Content-Type {shown}; send 'application/json' or 'text/csv'")


@dataclass(frozen=True)
class RecordProblem:
    """One bad value: ``record`` is the 0-based row index (None for a request-level field)."""

    record: int | None
    field: str
    message: str

    def as_dict(self) -> dict[str, Any]:
        return {"record": self.record, "field": self.field, "message": self.message}


class InvalidInput(ServiceError):
    """Valid JSON/CSV whose content cannot be used. ``problems`` says where."""

    def __init__(self, problems: list[RecordProblem] | str, field: str | None = None) -> None:
        if isinstance(problems, str):
            problems = [RecordProblem(None, field or "body", problems)]
        self.problems = problems
        super().__init__([p.as_dict() for p in problems])


class InvalidRecords(InvalidInput):
    """Some records have missing, non-numeric or non-finite values."""


class FeatureMismatch(InvalidInput):
    """The batch lacks columns that the version was fitted on."""


class BundleCorrupt(ServiceError):
    """A stored artifact is missing, fails its SHA-256 check or cannot be read; that version cannot be loaded."""

    def __init__(self, name: str, version: int, reason: str = "fails its SHA-256 check") -> None:
        super().__init__(
            f"the stored artifact of '{name}' version {version} {reason}; "
            "the version cannot be used (other versions are unaffected)"
        )


class FitTimeLimit(ServiceError):
    """The fit ran past its time limit; its worker was stopped and nothing was written."""

    def __init__(self, seconds: float) -> None:
        super().__init__(f"the fit did not finish within {seconds:g} s (setting SEGSCORE_FIT_TIME_LIMIT_SECONDS); "
                         "its worker was stopped and nothing was written; fit fewer records or a smaller k range")


class FitWorkerDied(ServiceError):
    """The worker process of a fit ended without an answer; nothing was written."""

    def __init__(self, exitcode: int | None) -> None:
        how = (f"was killed by signal {-exitcode}" if exitcode is not None and exitcode < 0
               else f"exited with code {exitcode}")
        super().__init__(f"the fit worker process {how} (for instance out of memory) before answering; "
                         "nothing was written; the fit can be retried")


class SourceForbidden(ServiceError):
    """The fit's data source is not allowed; nothing was read."""

    def __init__(self, reason: str) -> None:
        super().__init__(f"the source is refused ({reason}); nothing was read. Sources must lie under one of the "
                         "prefixes of the setting SEGSCORE_SOURCE_PREFIXES")


class FitCancelled(ServiceError):
    """The fit was cancelled; its work on the cluster was stopped and nothing was written."""


class ClusterUnavailable(ServiceError):
    """The Dask cluster cannot run the fit; nothing was written."""

    def __init__(self, address: str | None, why: str) -> None:
        super().__init__(f"the Dask scheduler {address or '(SEGSCORE_DASK_SCHEDULER)'} {why}; the fit stopped and "
                         "nothing was written; check the cluster and retry")


class StoreUnavailable(ServiceError):
    """The model store cannot be read or written."""
