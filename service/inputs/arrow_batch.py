"""Apache Arrow IPC stream bodies -> the same checked ``Batch`` the JSON and CSV paths produce (no web imports).

A backend that already holds its records as a table sends them as columns: one Arrow IPC *stream* (the
format of ``pyarrow.ipc.new_stream``; https://arrow.apache.org/docs/format/Columnar.html#ipc-streaming-format),
any number of record batches of one schema. The rules are those of a CSV body, column by column:

- every feature the version needs is a column (else a 422 naming it, with a "did you mean" hint); other
  columns are ignored; a name given twice is a 422;
- a feature column holds integers, floating-point numbers or decimals (any width); another type (strings,
  booleans, dates, lists) is a 422 naming the column and its type;
- a null is a missing value; NaN, infinities and ``|x| > MAX_ABS_VALUE`` are per-record problems naming record
  and field, exactly as in JSON (NaN is never a missing value);
- the ``id_column``, when present, holds integers or strings (a null id gets the row index, as in JSON);
- more than ``max_rows`` rows is a 413, counted from the messages' headers before any batch is decoded; a
  body that is not an Arrow stream (garbage, truncated, an Arrow *file*, failing validation) is a 400 saying so;
- compressed buffers (the format's optional LZ4/ZSTD body compression) are a 422: their decompressed size is
  only known once they are decompressed, so a small body could claim gigabytes. Uncompressed, every buffer
  is a view of the body, and memory stays within the body-size limit.
"""

from __future__ import annotations

import struct
from typing import Any, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from service.core.frame import (
    MAX_ABS_VALUE,
    Batch,
    _ids,
    _too_large_message,
    did_you_mean,
)
from service.errors import (
    BadBody,
    FeatureMismatch,
    InvalidInput,
    PayloadTooLarge,
    RecordProblem,
)
from service.inputs.checks import printable

ARROW_STREAM_TYPE = "application/vnd.apache.arrow.stream"
_FILE_MAGIC = b"ARROW1"


class _Flatbuffer:
    """Just enough of the FlatBuffers layout (https://flatbuffers.dev/internals/) to read a few scalar fields of
    an Arrow message header (format/Message.fbs) without decoding the message; every read is bounds-checked."""

    def __init__(self, data: bytes) -> None:
        self.data = data

    def read(self, fmt: str, position: int) -> int:
        if position < 0 or position + struct.calcsize(fmt) > len(self.data):
            raise ValueError("a message header points outside itself")
        return struct.unpack_from(fmt, self.data, position)[0]

    def root(self) -> int:
        return self.read("<I", 0)

    def field(self, table: int, index: int) -> int | None:
        """Absolute position of field ``index`` of the table at ``table``, None when it is absent."""
        vtable = table - self.read("<i", table)
        if 4 + 2 * index + 2 > self.read("<H", vtable):
            return None
        offset = self.read("<H", vtable + 4 + 2 * index)
        return table + offset if offset else None

    def table_at(self, position: int) -> int:
        return position + self.read("<I", position)


_RECORD_BATCH, _DICTIONARY_BATCH = 3, 2         # MessageHeader union tags (format/Message.fbs)


def _batch_header(metadata: bytes) -> tuple[int, bool] | None:
    """(row count, compressed?) of a record or dictionary batch message; None for other messages."""
    header = _Flatbuffer(metadata)
    message = header.root()
    kind_at, body_at = header.field(message, 1), header.field(message, 2)
    kind = header.read("<B", kind_at) if kind_at is not None else 0
    if kind not in (_RECORD_BATCH, _DICTIONARY_BATCH) or body_at is None:
        return None
    batch = header.table_at(body_at)
    if kind == _DICTIONARY_BATCH:                  # DictionaryBatch { id, data: RecordBatch, isDelta }
        data_at = header.field(batch, 1)
        if data_at is None:
            return None
        batch = header.table_at(data_at)
    length_at = header.field(batch, 0)             # RecordBatch { length, nodes, buffers, compression, ... }
    length = header.read("<q", length_at) if length_at is not None else 0
    return length, header.field(batch, 3) is not None


def _check_messages(buffer: pa.Buffer, max_rows: int) -> None:
    """Rows and compression from the message headers alone (nothing is decoded or decompressed here)."""
    rows = 0
    for message in pa.ipc.MessageReader.open_stream(buffer):
        facts = _batch_header(message.metadata.to_pybytes())
        if facts is None:
            continue
        length, compressed = facts
        if compressed:
            raise InvalidInput("compressed Arrow IPC buffers (LZ4 or ZSTD body compression) are not accepted: "
                               "their size is only known after decompression; send the stream uncompressed "
                               "(pyarrow: IpcWriteOptions(compression=None), the default)", field="body")
        if message.type == "record batch":
            rows += length
            if rows > max_rows:
                raise PayloadTooLarge(f"the batch has more than {max_rows} records; the limit is {max_rows}")


def read_arrow_stream(body: bytes, max_rows: int) -> pa.Table:
    """The body's record batches as one table (zero-copy views of ``body``), fully validated."""
    if body[:6] == _FILE_MAGIC:
        raise BadBody("the body is an Arrow IPC file (random-access format, starts with 'ARROW1'); send the "
                      f"stream format ({ARROW_STREAM_TYPE}, pyarrow.ipc.new_stream)")
    buffer = pa.py_buffer(body)
    try:
        _check_messages(buffer, max_rows)
        reader = pa.ipc.open_stream(buffer)
        batches = []
        for batch in reader:
            # Full validation: offsets and lengths inside the body, valid UTF-8, so a crafted stream cannot
            # make a later step read outside its buffers.
            batch.validate(full=True)
            batches.append(batch)
        table = pa.Table.from_batches(batches, schema=reader.schema)
        for field in table.schema:      # names and types must be valid UTF-8 (a UnicodeDecodeError otherwise)
            _ = (field.name, str(field.type))
        return table
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise BadBody(f"the body is not a valid Arrow IPC stream: {printable(str(exc))[:200]}") from None


def _is_number_type(kind: pa.DataType) -> bool:
    return pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_decimal(kind) \
        or pa.types.is_null(kind)


def _check_schema(schema: pa.Schema, features: Sequence[str], id_column: str | None) -> None:
    names = schema.names
    seen: set[str] = set()
    problems = []
    for name in names:
        if name in seen:
            problems.append(RecordProblem(None, printable(name), "the Arrow schema names this column more than once"))
        seen.add(name)
    if problems:
        raise InvalidInput(problems)
    absent = [f for f in features if f not in seen]
    if absent:
        extra = [c for c in names if c not in set(features) and c != id_column]
        raise FeatureMismatch([RecordProblem(None, f, "required column is absent from the Arrow schema"
                                             + did_you_mean(f, extra)) for f in absent])
    for name in features:
        kind = schema.field(name).type
        if not _is_number_type(kind):
            problems.append(RecordProblem(None, name, f"expected a numeric column (integer, floating point or "
                                          f"decimal), got Arrow type {kind}"))
    if id_column is not None and id_column in seen:
        kind = schema.field(id_column).type
        if not (pa.types.is_integer(kind) or pa.types.is_string(kind) or pa.types.is_large_string(kind)
                or pa.types.is_null(kind)):
            problems.append(RecordProblem(None, id_column, f"the id column must hold integers or strings, got "
                                          f"Arrow type {kind}"))
    if problems:
        raise InvalidInput(problems)


def _feature_column(column: pa.ChunkedArray, name: str, problems: list[RecordProblem]) -> np.ndarray:
    """One feature -> float64 (null -> NaN); NaN, infinite and too large values become problems (and NaN)."""
    n = len(column)
    if pa.types.is_null(column.type):
        return np.full(n, np.nan)
    # Integers beyond 2**53 round to the nearest float64, as a JSON integer does (hence safe=False).
    floats = pc.cast(column, pa.float64(), safe=False)
    if floats.null_count:
        present = pc.is_valid(floats).to_numpy(zero_copy_only=False)
        values = pc.fill_null(floats, np.nan).to_numpy()
    else:
        present = None
        values = floats.to_numpy()
    values = np.array(values, dtype=np.float64, copy=True)     # writable, and owned (not a view of the body)
    with np.errstate(invalid="ignore"):
        bad = ~(np.abs(values) <= MAX_ABS_VALUE)
    if present is not None:
        bad &= present
    for i in np.flatnonzero(bad).tolist():
        value = values[i]
        if np.isfinite(value):
            problems.append(RecordProblem(i, name, _too_large_message()))
        else:
            problems.append(RecordProblem(i, name, f"value must be finite, got {value}"))
        values[i] = np.nan
    return values


def batch_from_arrow(table: pa.Table, features: Sequence[str], id_column: str | None) -> Batch:
    """An Arrow table -> Batch of ``features`` (columns checked as the module docstring says)."""
    _check_schema(table.schema, features, id_column)
    problems: list[RecordProblem] = []
    values = np.empty((table.num_rows, len(features)), dtype=np.float64)
    for j, name in enumerate(features):
        values[:, j] = _feature_column(table.column(name), name, problems)
    raw_ids: Any
    if id_column is not None and id_column in table.schema.names:
        raw_ids = table.column(id_column).to_pylist()
    else:
        raw_ids = [None] * table.num_rows
    ids = _ids(raw_ids, id_column, problems) if id_column is not None else list(range(table.num_rows))
    problems.sort(key=lambda p: (p.record if p.record is not None else -1))
    return Batch(values, ids, problems)
