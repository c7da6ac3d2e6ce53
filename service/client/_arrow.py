"""Large tables go to the server as Apache Arrow IPC streams, and assign answers come back the same way.

"Large" (both limits are named constants of the client):
- an assign batch of at least ``ARROW_MIN_ROWS`` (1,000) rows, from a DataFrame (``Client.assign``) or a CSV
  file (``Client.assign_csv``, ``segscore assign``); smaller batches go as CSV;
- a drift batch given as a DataFrame of at least ``ARROW_MIN_ROWS`` rows, or as a CSV file of at least
  ``ARROW_MIN_FILE_BYTES`` (1 MiB, compressed size for gzip) (``Client.drift``, ``segscore drift``).

A CSV file's cells are text; here they become typed columns only where that cannot change what the server
would read: a column whose every non-empty cell is a plain number (``NUMBER``) becomes int64, uint64 or
float64 (Arrow's parser, correctly rounded), a column without any number stays text, an empty cell is a null
(the CSV form's missing value). A 422 about a whole column (its Arrow type: an id column of decimals, a
feature column of text) sends the batch again as CSV. A column that mixes numbers with other text (``1.5`` and ``n/a``, ``nan``,
`` 2`` with a space) makes the batch go as CSV, so that the server names the record and field exactly as it does
for CSV. Nothing here quotes a cell value.
"""

from __future__ import annotations

import csv
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv

from service.client._errors import UnexpectedResponse
from service.client._files import open_binary, open_text

ARROW_STREAM_TYPE = "application/vnd.apache.arrow.stream"
ARROW_MIN_ROWS = 1_000
ARROW_MIN_FILE_BYTES = 1 << 20
NUMBER = r"^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$"


@dataclass(frozen=True)
class ArrowBatch:
    """A batch to send as Arrow, with its CSV form (made on demand) for the case the server refuses a column."""

    table: pa.Table
    csv: Callable[[], bytes]


def column_refusal(detail: Any) -> bool:
    """True for a 422 about whole columns only (no record named): a column's Arrow type, say an id column of
    floats or a text feature. The batch is then sent again as CSV, which the server reads by its own rules (a
    CSV id is text; a text cell is a per-record problem), so the answer is exactly the CSV path's."""
    return isinstance(detail, list) and bool(detail) and all(
        isinstance(item, dict) and item.get("record") is None for item in detail)


def stream_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def _typed(column: pa.Array) -> pa.Array | None:
    """A column of CSV text -> numbers, text, or None when it mixes the two."""
    empty = pc.equal(column, "")
    filled = pc.if_else(empty, pa.scalar(None, pa.string()), column)
    present = len(column) - pc.sum(empty).as_py() if len(column) else 0
    if present == 0:
        return pa.nulls(len(column))          # every cell empty: all missing (null type; a CSV reads it so too)
    numbers = pc.sum(pc.match_substring_regex(filled, NUMBER)).as_py() or 0
    if numbers == 0:
        return filled
    if numbers < present:
        return None
    for kind in (pa.int64(), pa.uint64(), pa.float64()):
        try:
            return pc.cast(filled, kind)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            continue
    return None


def table_from_text(header: list[str], columns: list[pa.Array]) -> pa.Table | None:
    typed = []
    for column in columns:
        converted = _typed(column)
        if converted is None:
            return None
        typed.append(converted)
    return pa.table(typed, names=header)


def table_from_rows(header: list[str], rows: list[list[str]]) -> pa.Table | None:
    """CSV rows (lists of cells, as ``csv.reader`` gives them) -> typed table, or None (send CSV)."""
    return table_from_text([h.strip() for h in header],
                           [pa.array([row[i] for row in rows], type=pa.string()) for i in range(len(header))])


def table_from_file(path: Path) -> pa.Table | None:
    """A CSV file (gzip decompressed) -> typed table, or None when it should go as CSV: mixed columns, or a
    file Arrow's CSV reader refuses (a row with another field count, say), which the server then names."""
    with open_text(path) as handle:
        header = next((row for row in csv.reader(handle) if row), None)
    if not header:
        return None
    names = [name.strip() for name in header]
    if len(set(names)) != len(names) or not all(names):
        return None
    placeholders = [f"column{i}" for i in range(len(names))]    # names as the server strips them, set below
    with open_binary(path) as source:
        try:
            text = pa_csv.read_csv(
                source, read_options=pa_csv.ReadOptions(column_names=placeholders, skip_rows=1),
                parse_options=pa_csv.ParseOptions(newlines_in_values=True),
                convert_options=pa_csv.ConvertOptions(column_types=dict.fromkeys(placeholders, pa.string()),
                                                      strings_can_be_null=False, quoted_strings_can_be_null=False))
        except (pa.ArrowInvalid, OSError):
            return None
    if text.num_rows == 0:
        return None
    return table_from_text(names, [column.combine_chunks() for column in text.columns])


def table_from_frame(frame: pd.DataFrame) -> pa.Table | None:
    """A DataFrame (index not sent) -> table, or None when a column holds mixed Python objects (send CSV)."""
    frame = frame.set_axis([str(c) for c in frame.columns], axis=1)
    try:
        # NaN -> null (a missing value, as an empty CSV cell); an infinity stays a value the server refuses.
        return pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, TypeError, ValueError):
        return None


def assign_answer(body: bytes) -> dict[str, Any]:
    """An Arrow assign answer -> the JSON answer's shape (``name``, ``version``, ``results``, ``errors``)."""
    try:
        table = pa.ipc.open_stream(body).read_all()
        metadata = table.schema.metadata or {}
        return {"name": metadata[b"name"].decode(), "version": int(metadata[b"version"]),
                "results": table.to_pylist(), "errors": orjson.loads(metadata[b"errors"])}
    except (pa.ArrowException, KeyError, ValueError) as exc:
        raise UnexpectedResponse(200, f"an {ARROW_STREAM_TYPE} answer that cannot be read ({exc})") from None
