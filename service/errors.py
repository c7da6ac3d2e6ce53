"""Errors the service raises on purpose. ``service.app`` alone maps each class to an HTTP status.

    ServiceError
    ├── BadBody                  body is not valid JSON or CSV
    ├── AuthError
    │   ├── MissingKey           no or unknown API key
    │   └── ScopeDenied          key lacks the scope
    ├── NotFound
    │   ├── SegmentationNotFound
    │   ├── LiveDriftOff         live drift switched off (SEGSCORE_LIVE_DRIFT=false)
    │   ├── VersionNotFound
    │   ├── SegmentNotFound
    │   └── KeyNotFound          no API key of that name (keys revoke)
    │   ├── ChartNotFound
    │   ├── DriftReportNotFound
    │   └── JobNotFound          no background job of that id
    ├── Conflict
    │   ├── NoLiveVersion
    │   ├── KeyNameTaken         an API key of that name exists
    │   ├── JobFinished          a finished job cannot be cancelled
    │   ├── JobReportNotReady    a job that is not done has no report
    │   ├── JobNotRunning        the job was cancelled or failed while its fit ran: its version is not written
    │   └── FitCancelled         the fit's job was cancelled; its worker (or its cluster work) was stopped
    ├── BodyTimeout              the client stopped sending its body
    ├── PayloadTooLarge
    ├── UnsupportedMediaType     body neither JSON nor CSV (nor Arrow, where a route takes it)
    ├── InvalidInput             well-formed body, unusable content
    │   ├── InvalidRecords       per-record problems (index and field)
    │   └── FeatureMismatch      columns the version needs are absent
    ├── FitTimeLimit             a fit ran past SEGSCORE_FIT_TIME_LIMIT_SECONDS; its worker was stopped
    ├── FitWorkerDied            the worker process of a fit ended without an answer (killed, out of memory)
    ├── SourceForbidden          a fit's data source lies outside SEGSCORE_SOURCE_PREFIXES (or none is set)
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


class LiveDriftOff(NotFound):
    """Live drift is switched off on this server, so there are no live counts to report on."""

    def __init__(self) -> None:
        super().__init__("live drift is off on this server (SEGSCORE_LIVE_DRIFT=false): no live counts are kept")


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


class JobNotFound(NotFound):
    """No such job."""

    def __init__(self, job_id: str) -> None:
        super().__init__(f"there is no job {job_id[:40]!r}")


class JobFinished(Conflict):
    """The job has finished; only a queued or running job can be cancelled."""

    def __init__(self, job_id: str, state: str) -> None:
        self.state = state
        super().__init__(f"job {job_id!r} is {state}; only a queued or running job can be cancelled")


class JobReportNotReady(Conflict):
    """The job is not done: it has no fit report (yet)."""

    def __init__(self, job_id: str, state: str) -> None:
        self.state = state
        super().__init__(f"job {job_id!r} is {state}; a job has a fit report once it is done")


class JobNotRunning(Conflict):
    """The job is no longer running (cancelled, or failed by a server restart): its version is not written."""

    def __init__(self, job_id: str, state: str | None) -> None:
        self.state = state
        super().__init__(f"job {job_id!r} is {state or 'gone'}; its version was not written")


class BodyTimeout(ServiceError):
    """The client stopped sending the request body."""

    def __init__(self, seconds: float) -> None:
        super().__init__(f"no part of the request body arrived for {seconds:g} s; the connection is closed")


class PayloadTooLarge(ServiceError):
    """The request is larger than the configured limit."""


class UnsupportedMediaType(ServiceError):
    """The body must be JSON ('Content-Type: application/json') or CSV ('Content-Type: text/csv')."""

    def __init__(self, content_type: str, also: tuple[str, ...] = ()) -> None:
        """``also``: media types the route takes besides JSON and CSV (assign and drift: Arrow)."""
        shown = repr(content_type) if content_type else "none"
        if also:
            accepted = ", ".join(f"'{t}'" for t in ("application/json", "text/csv", *also))
            super().__init__(f"unsupported Content-Type {shown}; send one of {accepted}")
        else:
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


class FitWorkerCannotStart(ServiceError):
    """The server could not start a fit worker process; nothing was written."""

    def __init__(self, reason: str, temp_dir_length: int) -> None:
        hint = ""
        if "path too long" in reason:
            # The worker's socket lives under the temporary directory, and a Unix socket path holds at most
            # 107 bytes: a long TMPDIR (some CI runners and sandboxes set one) makes every fit fail here.
            hint = (f"; the temporary directory's path ({temp_dir_length} characters) is too long for the "
                    "worker's socket: set TMPDIR to a shorter path and restart the server")
        super().__init__(f"the server could not start a fit worker process ({reason}){hint}; nothing was written")


class FitCancelled(Conflict):
    """The fit's job was cancelled; its worker (or its work on the Dask cluster) was stopped and nothing was
    written."""


class SourceForbidden(ServiceError):
    """The fit's data source is not allowed; nothing was read."""

    def __init__(self, reason: str) -> None:
        super().__init__(f"the source is refused ({reason}); nothing was read. Sources must lie under one of the "
                         "prefixes of the setting SEGSCORE_SOURCE_PREFIXES")


class ClusterUnavailable(ServiceError):
    """The Dask cluster cannot run the fit; nothing was written."""

    def __init__(self, address: str | None, why: str) -> None:
        super().__init__(f"the Dask scheduler {address or '(SEGSCORE_DASK_SCHEDULER)'} {why}; the fit stopped and "
                         "nothing was written; check the cluster and retry")


class StoreUnavailable(ServiceError):
    """The model store cannot be read or written."""
