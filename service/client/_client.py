"""A synchronous Python client of the segscore HTTP API, on httpx2.

Every method sends one request (``assign`` and ``assign_csv``: one per batch) and returns the decoded JSON
answer, or a DataFrame for ``assign``. Errors are the classes of ``service.client._errors``. Tables go over
the wire as CSV (a DataFrame through ``DataFrame.to_csv``, whose floats round-trip exactly; a file path is
streamed as it is), lists of records as JSON; large tables as Apache Arrow IPC streams (``_arrow``: assign
batches of at least 1,000 rows, drift DataFrames of as many rows and CSV files of at least 1 MiB), with the
assign answer in Arrow too.
"""

from __future__ import annotations

import csv
import io
import json
import os
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any
from urllib.parse import quote

import httpx2
import pandas as pd
import pyarrow as pa

from service.client import _arrow
from service.client._errors import (
    ApiError,
    InvalidInput,
    JobFailed,
    LocalInputError,
    ServerUnreachable,
    UnexpectedResponse,
    api_error,
)
from service.client._files import CHUNK_BYTES, csv_chunks, open_text

DEFAULT_URL = "http://127.0.0.1:8000"
URL_VARIABLE = "SEGSCORE_URL"
KEY_VARIABLE = "SEGSCORE_API_KEY"
DEFAULT_TIMEOUT = httpx2.Timeout(60.0, connect=10.0)
# A fit answers when it is done; a large one takes minutes.
FIT_TIMEOUT = httpx2.Timeout(3600.0, connect=10.0)
# Rows per assign request: well under the server's default limit (100,000) and a few MB of CSV each.
ASSIGN_BATCH_ROWS = 10_000
UPLOAD_CHUNK_BYTES = CHUNK_BYTES
# Columns that assign adds to a table, in this order (the fields of one assign result, id left out).
RESULT_COLUMNS = ("segment", "label", "distance", "outlier", "outlier_reasons", "runner_up", "margin", "residual",
                  "imputed")
# pandas dtypes of the added columns (nullable, so rows skipped with on_error="skip" hold <NA>); the rest,
# label and the two lists, are objects.
RESULT_DTYPES = {"segment": "Int64", "runner_up": "Int64", "outlier": "boolean", "distance": "float64",
                 "margin": "float64", "residual": "float64"}
_SERVER_DEFAULT: Any = object()
# How often a followed background job is read again.
JOB_POLL_SECONDS = 0.5
FINISHED_JOB_STATES = ("done", "failed", "cancelled")


class Client:
    """The segscore API from Python.

    ``url`` defaults to ``$SEGSCORE_URL`` or http://127.0.0.1:8000, ``key`` to ``$SEGSCORE_API_KEY`` (sent as
    ``Authorization: Bearer <key>``). ``transport`` replaces httpx2's network transport; ``http`` is a ready
    httpx2.Client to send through instead of making one (a starlette TestClient in tests; its ``base_url`` is
    the server, and it is not closed by ``close``). Use as a context manager or call ``close``.

    Data arguments (``fit``, ``drift``) take a list of record dicts (sent as JSON), a pandas DataFrame (sent as
    CSV; the index is not sent) or the path of a CSV file with a header row (streamed as it is). Large ones
    go as Arrow IPC streams (see ``service.client._arrow`` for the sizes); ``arrow=False`` sends CSV always
    (for a server older than the Arrow format).
    """

    def __init__(self, url: str | None = None, *, key: str | None = None,
                 timeout: httpx2.Timeout | float = DEFAULT_TIMEOUT, fit_timeout: httpx2.Timeout | float = FIT_TIMEOUT,
                 transport: httpx2.BaseTransport | None = None, http: httpx2.Client | None = None,
                 arrow: bool = True) -> None:
        self.arrow = arrow
        key = key if key is not None else os.environ.get(KEY_VARIABLE)
        self._headers = {"Authorization": f"Bearer {key}"} if key else {}
        if http is not None:
            # A given client keeps its own timeouts (a TestClient refuses per-request ones).
            self._http, self._owns_http, self._fit_timeout = http, False, httpx2.USE_CLIENT_DEFAULT
        else:
            base = (url or os.environ.get(URL_VARIABLE) or DEFAULT_URL).rstrip("/")
            if not base.startswith(("http://", "https://")):
                raise LocalInputError(f"the server URL must start with http:// or https://; got {base!r}")
            try:
                self._http = httpx2.Client(base_url=base, timeout=timeout, transport=transport)
            except httpx2.InvalidURL as exc:
                raise LocalInputError(f"not a usable server URL: {base!r} ({exc})") from None
            self._owns_http, self._fit_timeout = True, fit_timeout
        self.url = str(self._http.base_url).rstrip("/")

    def close(self) -> None:
        if self._owns_http:
            self._http.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc_info: Any) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Client(url={self.url!r})"

    # ------------------------------------------------------------------ transport
    def _request(self, method: str, path: str, *, params: Mapping[str, Any] | None = None, document: Any = None,
                 content: bytes | Iterator[bytes] | None = None, content_type: str | None = None,
                 timeout: Any = httpx2.USE_CLIENT_DEFAULT, accept: str | None = None) -> Any:
        """Send one request; a JSON ``document`` or raw ``content``. Returns the decoded JSON answer (the raw
        bytes of an Arrow answer, which only a request with ``accept`` set to Arrow gets)."""
        headers = dict(self._headers)
        if document is not None:
            content, content_type = _json_body(document), "application/json"
        if content_type:
            headers["Content-Type"] = content_type
        if accept:
            headers["Accept"] = accept
        try:
            response = self._http.request(method, path, params=params, content=content, headers=headers,
                                          timeout=timeout)
        except httpx2.TransportError as exc:
            raise ServerUnreachable(self.url, exc) from exc
        if response.status_code >= 400:
            try:
                detail = response.json().get("detail")
            except (ValueError, AttributeError):
                detail = response.text[:500] or response.reason_phrase
            raise api_error(response.status_code, detail, method=method, path=path)
        if accept == _arrow.ARROW_STREAM_TYPE and response.headers.get("content-type", "") == accept:
            return response.content
        try:
            return response.json()
        except ValueError:
            raise UnexpectedResponse(response.status_code, response.headers.get("content-type", "")) from None

    @staticmethod
    def _path(name: str, *parts: Any) -> str:
        return "/v1/segmentations/" + "/".join(quote(str(p), safe="") for p in (name, *parts))

    # ------------------------------------------------------------------ reads
    def ready(self) -> dict[str, Any]:
        """The server's readiness answer (``GET /readyz``); ServerError (503) when it is not ready."""
        return self._request("GET", "/readyz")

    def segmentations(self) -> list[dict[str, Any]]:
        """Every segmentation: name, live_version, latest_version, created_at, updated_at."""
        return self._request("GET", "/v1/segmentations")["segmentations"]

    def segmentation(self, name: str) -> dict[str, Any]:
        """One segmentation with a summary row per version under ``versions``."""
        return self._request("GET", self._path(name))

    def versions(self, name: str) -> list[dict[str, Any]]:
        """The version rows of a segmentation: version, created_at, live, k, n_records, data_sha256."""
        return self.segmentation(name)["versions"]

    def version(self, name: str, version: int) -> dict[str, Any]:
        """The fit report of one version (``live`` is the current state, labels the current labels)."""
        return self._request("GET", self._path(name, "versions", version))

    def compare(self, name: str, v: int, w: int, *, min_share: float | None = None) -> dict[str, Any]:
        """How the segments of version v map onto those of w, with v's labels suggested for w's segments."""
        params = {"min_share": min_share} if min_share is not None else None
        return self._request("GET", self._path(name, "versions", v, "compare", w), params=params)

    def drift_reports(self, name: str, *, version: int | None = None, limit: int | None = None) -> list[dict[str, Any]]:
        """Stored drift reports, newest first."""
        params = {k: v for k, v in (("version", version), ("limit", limit)) if v is not None}
        return self._request("GET", self._path(name, "drift"), params=params)["reports"]

    # ------------------------------------------------------------------ writes
    def fit(self, name: str, data: Any, *, features: Sequence[str] | None = None, id_column: str | None = None,
            scaling: str | None = None, components: int | float | None = _SERVER_DEFAULT, method: str | None = None,
            linkage: str | None = None, k: int | tuple[int, int] | Mapping[str, int] | None = None,
            selection: str | None = None, n_init: int | None = None, seed: int | None = None,
            outlier_quantile: float | None = None, make_live: bool | None = None,
            upload_progress: Callable[[int, int], None] | None = None, background: bool = False,
            progress: Callable[[str, float], None] | None = None, wait: bool = True) -> dict[str, Any]:
        """Fit a new version and return its fit report (waits until the fit is done).

        Parameters left at None take the server's defaults; ``components=None`` means no PCA (leave it out for
        the default). ``k`` is an int, a ``(min, max)`` pair or ``{"min": .., "max": ..}``.
        ``upload_progress(bytes handed to the connection, total bytes)`` is called per 1 MiB chunk of a CSV
        body (a DataFrame or a file).

        ``background=True`` runs the fit as a server job (``?background=true``): the request is checked at once
        (a bad one raises as a synchronous fit does), then the job is followed until it ends, calling
        ``progress(step, fraction)`` whenever it moves (see ``follow_job``); the report is returned as for a
        synchronous fit, and ``JobFailed`` raised if the job fails or is cancelled. With ``wait=False`` the job
        resource is returned as soon as it is queued.
        """
        given = {"features": features, "id_column": id_column, "scaling": scaling, "method": method,
                 "linkage": linkage, "k": _k_range(k), "selection": selection, "n_init": n_init, "seed": seed,
                 "outlier_quantile": outlier_quantile, "make_live": make_live}
        params = {key: value for key, value in given.items() if value is not None}
        if components is not _SERVER_DEFAULT:
            params["components"] = components
        path = self._path(name, "fit")
        flag = {"background": "true"} if background else {}
        if isinstance(data, list):
            answer = self._request("POST", path, params=flag or None, document={"records": data, **params},
                                   timeout=self._fit_timeout)
        else:
            answer = self._request("POST", path, params={**_query_form(params), **flag},
                                   content=_csv_content(data, upload_progress), content_type="text/csv",
                                   timeout=self._fit_timeout)
        if not background or not wait:
            return answer
        return self.follow_job(answer["id"], progress=progress)

    # ------------------------------------------------------------------ background fit jobs
    def jobs(self, *, segmentation: str | None = None, limit: int | None = None) -> list[dict[str, Any]]:
        """Background fit jobs, newest first (of one segmentation if given)."""
        params = {k: v for k, v in (("segmentation", segmentation), ("limit", limit)) if v is not None}
        return self._request("GET", "/v1/jobs", params=params)["jobs"]

    def job(self, job_id: str) -> dict[str, Any]:
        """One job: id, segmentation, state, step, progress, version, error, created_at, updated_at."""
        return self._request("GET", "/v1/jobs/" + quote(job_id, safe=""))

    def job_report(self, job_id: str) -> dict[str, Any]:
        """The fit report of the version a done job wrote (needs the ``fit`` scope only); Conflict if not done."""
        return self._request("GET", "/v1/jobs/" + quote(job_id, safe="") + "/report")

    def cancel_job(self, job_id: str) -> dict[str, Any]:
        """Cancel a queued or running job (no version is written); Conflict (409) once it has finished."""
        return self._request("DELETE", "/v1/jobs/" + quote(job_id, safe=""))

    def follow_job(self, job_id: str, *, progress: Callable[[str, float], None] | None = None,
                   poll_seconds: float = JOB_POLL_SECONDS) -> dict[str, Any]:
        """Read job ``job_id`` every ``poll_seconds`` until it ends; call ``progress(step, fraction)`` each time
        its step or progress changed. Returns the fit report of the version it wrote; ``JobFailed`` if it
        failed (``detail``: what a synchronous fit would have answered) or was cancelled."""
        seen: tuple[str, float] | None = None
        while True:
            job = self.job(job_id)
            if progress is not None and (job["step"], job["progress"]) != seen:
                seen = (job["step"], job["progress"])
                progress(*seen)
            if job["state"] == "done":
                return self.job_report(job_id)
            if job["state"] in FINISHED_JOB_STATES:
                raise JobFailed(job)
            time.sleep(poll_seconds)

    def promote(self, name: str, version: int) -> dict[str, Any]:
        """Make ``version`` live (promote or roll back); returns the segmentation."""
        return self._request("PUT", self._path(name, "live"), document={"version": version})

    def label(self, name: str, version: int, segment: int, label: str | None) -> dict[str, Any]:
        """Name a segment (None removes the label); returns the segment."""
        return self._request("PATCH", self._path(name, "versions", version, "segments", segment),
                             document={"label": label})

    def carry_labels(self, name: str, from_version: int, to_version: int, *, min_share: float | None = None,
                     overwrite: bool = False) -> list[dict[str, Any]]:
        """Apply the label suggestions of ``compare(name, from_version, to_version)`` to ``to_version``.

        A segment that already has a label keeps it unless ``overwrite``. Returns the suggestions applied."""
        suggestions = self.compare(name, from_version, to_version, min_share=min_share)["suggestions"]
        applied = []
        for suggestion in suggestions:
            if suggestion["current_label"] == suggestion["label"]:
                continue
            if suggestion["current_label"] is not None and not overwrite:
                continue
            self.label(name, to_version, suggestion["segment"], suggestion["label"])
            applied.append(suggestion)
        return applied

    # ------------------------------------------------------------------ scoring
    def assign_records(self, name: str, records: list[dict[str, Any]], *, version: int | None = None,
                       on_error: str = "fail") -> dict[str, Any]:
        """The assign answer for a list of records, as the server sends it."""
        return self._request("POST", self._path(name, "assign"), params=_scoring_params(version, on_error),
                             document={"records": records})

    def assign(self, name: str, frame: pd.DataFrame, *, version: int | None = None, on_error: str = "fail",
               columns: Sequence[str] = RESULT_COLUMNS, batch_rows: int = ASSIGN_BATCH_ROWS,
               progress: Callable[[int, int | None], None] | None = None) -> pd.DataFrame:
        """``frame`` with the assign results added as ``columns`` (a subset of RESULT_COLUMNS), same index.

        Sent as CSV in batches of ``batch_rows``; every batch uses the version the first one was assigned with
        (the live one unless ``version``). Refuses (LocalInputError) when an added column would overwrite a
        column of ``frame``. With ``on_error="skip"`` rows the server could not use get missing values and
        ``attrs["errors"]`` lists them (``record``: 0-based row position); ``attrs["version"]`` is the version
        used. ``progress(rows done, total rows)`` is called after each batch.
        """
        if not isinstance(frame, pd.DataFrame):
            raise LocalInputError(f"assign takes a pandas DataFrame; got {type(frame).__name__}")
        columns = _result_columns(columns, [str(c) for c in frame.columns])
        _positive(batch_rows, "batch_rows")
        batches = ((self._frame_body(frame.iloc[start:start + batch_rows]), min(batch_rows, len(frame) - start), None)
                   for start in range(0, len(frame), batch_rows))
        run = _AssignRun(self, name, version, on_error, total=len(frame), progress=progress)
        values: dict[str, list[Any]] = {c: [] for c in columns}
        for _, results in run.send(batches):
            for column in columns:
                values[column].extend(None if r is None else r[column] for r in results)
        out = frame.copy()
        for column in columns:
            out[column] = pd.Series(values[column], index=frame.index, dtype=RESULT_DTYPES.get(column, "object"))
        out.attrs["errors"], out.attrs["version"] = run.errors, run.version
        return out

    def assign_csv(self, name: str, path: str | os.PathLike[str], out_path: str | os.PathLike[str], *,
                   version: int | None = None, on_error: str = "fail", columns: Sequence[str] = RESULT_COLUMNS,
                   batch_rows: int = ASSIGN_BATCH_ROWS,
                   progress: Callable[[int, int | None], None] | None = None) -> dict[str, Any]:
        """Assign the rows of a CSV file in batches, streaming: write them to ``out_path`` with ``columns`` added.

        Memory holds one batch. Input cells are copied as they are (blank lines dropped); lists
        (outlier_reasons, imputed) are joined with ';'; rows skipped under ``on_error="skip"`` get empty result
        cells. The output is written to a temporary file renamed at the end, so nothing is left at ``out_path``
        when a batch fails. Returns ``{"version", "rows", "assigned", "errors"}`` (an error's ``record`` is the
        0-based data row of the file). ``progress(rows done, None)`` is called after each batch.
        """
        source, target = Path(path), Path(out_path)
        _positive(batch_rows, "batch_rows")
        with open_text(source) as handle:      # a gzip file is decompressed
            reader = csv.reader(handle)
            header = next(reader, None)
            if not header:
                raise LocalInputError(f"{source}: the file is empty; expected a header row")
            columns = _result_columns(columns, [h.strip() for h in header])
            run = _AssignRun(self, name, version, on_error, total=None, progress=progress)
            target.parent.mkdir(parents=True, exist_ok=True)
            fd, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".partial", dir=target.parent)
            try:
                with os.fdopen(fd, "w", newline="", encoding="utf-8") as out:
                    writer = csv.writer(out)
                    writer.writerow([*header, *columns])
                    batches = _csv_batches(reader, header, source, batch_rows,
                                           _arrow.ARROW_MIN_ROWS if self.arrow else None)
                    for rows, results in run.send(batches):
                        writer.writerows([*row, *(_csv_cell(None if r is None else r[c]) for c in columns)]
                                         for row, r in zip(rows, results))
                os.replace(temporary, target)
            except BaseException:
                Path(temporary).unlink(missing_ok=True)
                raise
        return {"version": run.version, "rows": run.rows, "assigned": run.assigned, "errors": run.errors}

    def _frame_body(self, frame: pd.DataFrame) -> bytes | _arrow.ArrowBatch:
        """A DataFrame batch as an Arrow table when it is large (and Arrow can hold it), else as CSV bytes."""
        if self.arrow and len(frame) >= _arrow.ARROW_MIN_ROWS:
            table = _arrow.table_from_frame(frame)
            if table is not None:
                return _arrow.ArrowBatch(table, lambda: frame.to_csv(index=False).encode("utf-8"))
        return frame.to_csv(index=False).encode("utf-8")

    def _assign_body(self, name: str, body: bytes | _arrow.ArrowBatch, version: int | None,
                     on_error: str) -> dict[str, Any]:
        """One assign batch: CSV bytes, or an Arrow table (sent and answered as Arrow IPC streams)."""
        params = _scoring_params(version, on_error)
        if isinstance(body, _arrow.ArrowBatch):
            try:
                answer = self._request("POST", self._path(name, "assign"), params=params,
                                       content=_arrow.stream_bytes(body.table), content_type=_arrow.ARROW_STREAM_TYPE,
                                       accept=_arrow.ARROW_STREAM_TYPE)
            except InvalidInput as error:
                if not _arrow.column_refusal(error.detail):
                    raise
                body = body.csv()           # the CSV form, whose refusal (if any) names the records
            else:
                return _arrow.assign_answer(answer) if isinstance(answer, bytes) else answer
        return self._request("POST", self._path(name, "assign"), params=params, content=body,
                             content_type="text/csv")

    def drift(self, name: str, data: Any, *, version: int | None = None, on_error: str = "fail") -> dict[str, Any]:
        """Compare a batch with the version's training distribution; the server stores the report and returns it."""
        path = self._path(name, "drift")
        params = _scoring_params(version, on_error)
        if isinstance(data, list):
            return self._request("POST", path, params=params, document={"records": data})
        table = self._large_table(data)
        if table is not None:
            try:
                return self._request("POST", path, params=params, content=_arrow.stream_bytes(table),
                                     content_type=_arrow.ARROW_STREAM_TYPE)
            except InvalidInput as error:
                if not _arrow.column_refusal(error.detail):
                    raise
        return self._request("POST", path, params=params, content=_csv_content(data), content_type="text/csv")

    def _large_table(self, data: Any) -> pa.Table | None:
        """A large DataFrame or CSV file as an Arrow table; None: send it as CSV."""
        if not self.arrow:
            return None
        if isinstance(data, pd.DataFrame):
            return _arrow.table_from_frame(data) if len(data) >= _arrow.ARROW_MIN_ROWS else None
        if isinstance(data, (str, os.PathLike)):
            path = Path(data)
            if path.is_file() and os.access(path, os.R_OK) and path.stat().st_size >= _arrow.ARROW_MIN_FILE_BYTES:
                return _arrow.table_from_file(path)
        return None


class _AssignRun:
    """Sends assign batches one after another; yields each batch's results aligned with its rows.

    A batch is ``(CSV body or Arrow table, row count, payload)``; ``send`` yields ``(payload, results)`` with ``results[i]``
    the result of the batch's row i, or None for a row the server skipped. Afterwards: ``version`` (the one
    every batch used), ``rows``, ``assigned``, and ``errors`` with record numbers counted over all batches.
    """

    def __init__(self, client: Client, name: str, version: int | None, on_error: str, *, total: int | None,
                 progress: Callable[[int, int | None], None] | None) -> None:
        self._client, self._name, self._on_error = client, name, on_error
        self._total, self._progress = total, progress
        self.version, self.rows, self.assigned = version, 0, 0
        self.errors: list[dict[str, Any]] = []

    def send(self, batches: Iterator[tuple[bytes | _arrow.ArrowBatch, int, Any]]) -> Iterator[tuple[Any, list[dict[str, Any] | None]]]:
        for body, n_rows, payload in batches:
            start = self.rows
            try:
                answer = self._client._assign_body(self._name, body, self.version, self._on_error)
            except ApiError as error:
                _shift_records(error.detail, start)
                raise
            self.version = answer["version"]           # later batches use the version the first one got
            errors = answer.get("errors") or []
            skipped = {e["record"] for e in errors if isinstance(e.get("record"), int)}
            _shift_records(errors, start)
            self.errors.extend(errors)
            good = [i for i in range(n_rows) if i not in skipped]
            results = answer["results"]
            if len(results) != len(good):
                raise UnexpectedResponse(200, "an assign answer whose results do not match the batch's rows")
            aligned: list[dict[str, Any] | None] = [None] * n_rows
            for i, result in zip(good, results):
                aligned[i] = result
            self.rows += n_rows
            self.assigned += len(results)
            yield payload, aligned
            if self._progress is not None:
                self._progress(self.rows, self._total)


def _plain(value: Any) -> Any:
    """numpy scalars (np.int64, np.bool_, ...) as the Python numbers they hold; anything else is refused."""
    item = getattr(value, "item", None)
    if callable(item) and getattr(value, "shape", None) == ():
        return item()
    raise TypeError(f"a {type(value).__name__} is not a JSON value")


def _json_body(document: Any) -> bytes:
    try:
        return json.dumps(document, allow_nan=False, ensure_ascii=False, separators=(",", ":"),
                          default=_plain).encode("utf-8")
    except (ValueError, TypeError) as exc:
        raise LocalInputError(f"the records cannot be sent as JSON ({exc}); use None for a missing value "
                              "and plain numbers and strings, or pass a DataFrame") from None


def _shift_records(items: Any, offset: int) -> None:
    """Make the ``record`` numbers of error items count from the first row of the whole input."""
    if offset and isinstance(items, list):
        for item in items:
            if isinstance(item, dict) and isinstance(item.get("record"), int):
                item["record"] += offset


def _csv_batches(reader: Any, header: list[str], source: Path, batch_rows: int,
                 arrow_min_rows: int | None = None) -> Iterator[tuple[bytes | _arrow.ArrowBatch, int, Any]]:
    """Batches of ``batch_rows`` data rows as (CSV text with the header, row count, the rows); a batch of at
    least ``arrow_min_rows`` rows as an Arrow table instead, unless a column mixes numbers and text. Blank
    lines are dropped; a row with another field count than the header is refused, naming its line."""

    def body(rows: list[list[str]]) -> bytes | _arrow.ArrowBatch:
        if arrow_min_rows is not None and len(rows) >= arrow_min_rows:
            table = _arrow.table_from_rows(header, rows)
            if table is not None:
                return _arrow.ArrowBatch(table, lambda: _csv_text([header, *rows]))
        return _csv_text([header, *rows])

    rows: list[list[str]] = []
    for row in reader:
        if not row:
            continue
        if len(row) != len(header):
            raise LocalInputError(f"{source}: line {reader.line_num} has {len(row)} fields; the header has "
                                  f"{len(header)} (is the delimiter a comma?)")
        rows.append(row)
        if len(rows) == batch_rows:
            yield body(rows), len(rows), rows
            rows = []
    if rows:
        yield body(rows), len(rows), rows


def _csv_text(rows: list[list[str]]) -> bytes:
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows(rows)
    return buffer.getvalue().encode("utf-8")


def _csv_cell(value: Any) -> Any:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, list):
        return ";".join(map(str, value))
    return value


def _result_columns(columns: Sequence[str], existing: list[str]) -> list[str]:
    columns = list(columns)
    unknown = [c for c in columns if c not in RESULT_COLUMNS]
    if unknown:
        raise LocalInputError(f"unknown result column(s) {unknown}; choose from {list(RESULT_COLUMNS)}")
    clash = [c for c in columns if c in existing]
    if clash:
        raise LocalInputError(f"the input already has column(s) {clash}; rename them or choose other result "
                              "columns (an input column is never overwritten)")
    return columns


def _positive(value: int, name: str) -> int:
    if not isinstance(value, int) or value < 1:
        raise LocalInputError(f"{name} must be a positive integer; got {value!r}")
    return value


def _scoring_params(version: int | None, on_error: str) -> dict[str, Any]:
    return {"on_error": on_error} if version is None else {"version": version, "on_error": on_error}


def _k_range(k: Any) -> Any:
    if isinstance(k, tuple):
        low, high = k
        return {"min": low, "max": high}
    return k


def _query_form(params: Mapping[str, Any]) -> dict[str, str]:
    """Fit parameters as a CSV fit's query string spells them (lists comma-separated, k as 2-10, 'none')."""
    query = {}
    for key, value in params.items():
        if key == "features":
            if any("," in name for name in value):
                raise LocalInputError("a feature name holds a comma, which the CSV form's features=a,b cannot "
                                      "carry; send the data as a list of records instead")
            query[key] = ",".join(value)
        elif key == "k" and isinstance(value, Mapping):
            query[key] = f"{value['min']}-{value['max']}"
        elif value is None:
            query[key] = "none"
        elif isinstance(value, bool):
            query[key] = "true" if value else "false"
        else:
            query[key] = str(value)
    return query


def _csv_content(data: Any, progress: Callable[[int, int], None] | None = None) -> bytes | Iterator[bytes]:
    """A DataFrame as CSV bytes, or a CSV file's bytes streamed in chunks (checked readable first; a gzip
    file is decompressed on the way). With ``progress``, ``progress(bytes so far, total)`` follows each chunk."""
    if isinstance(data, pd.DataFrame):
        body = data.to_csv(index=False).encode("utf-8")
        return body if progress is None else _counted(iter([body]), len(body), progress)
    if isinstance(data, (str, os.PathLike)):
        path = Path(data)
        if not path.is_file():
            raise LocalInputError(f"{path}: no such file")
        if not os.access(path, os.R_OK):
            raise LocalInputError(f"{path}: the file is not readable")
        return csv_chunks(path, progress, chunk_bytes=UPLOAD_CHUNK_BYTES)
    raise LocalInputError(f"expected a list of records, a DataFrame or a CSV file path; got {type(data).__name__}")


def _counted(chunks: Iterator[bytes], total: int, progress: Callable[[int, int], None]) -> Iterator[bytes]:
    done = 0
    for chunk in chunks:
        for start in range(0, len(chunk), UPLOAD_CHUNK_BYTES):
            piece = chunk[start:start + UPLOAD_CHUNK_BYTES]
            yield piece
            done += len(piece)
            progress(done, total)
