"""A fit upload spooled to a file (CSV, gzip-compressed CSV, Parquet) -> the checked training matrix file.

The upload is read in blocks and each block is checked with the same rules as a CSV body held in memory
(``service.core.frame.read_csv`` and ``batch_from_frame``: header, delimiter, field counts, UTF-8, numbers),
with line and record numbers counted from the start of the file. Each block's feature columns are appended to
a float64 file (``MatrixFile``), so neither the upload nor the matrix is ever held whole in memory.

The default features are chosen on the first block (its numeric columns, and text columns holding some
numbers); a later cell that is not a number is reported by record and column, as in memory.
"""

from __future__ import annotations

import gzip
import shutil
import tempfile
import zlib
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np
import pandas as pd

from schemas import FitRequest
from service.core.bundle import FitConfig
from service.core.frame import MAX_LISTED_PROBLEMS, batch_from_frame, read_csv
from service.engines.out_of_core import ColumnMoments
from service.engines.source import MatrixFile
from service.errors import BadBody, InvalidInput, InvalidRecords, PayloadTooLarge, RecordProblem
from service.inputs.checks import validate_model
from service.inputs.fit_input import (
    _fit_config,
    _query_parameters,
    _resolve_features,
    csv_feature_candidates,
    usable_columns,
)

# Bytes of CSV text checked and converted at once; a single line may not be longer.
BLOCK_BYTES = 16 * 1024 * 1024
PARQUET_BATCH_ROWS = 65_536
GZIP_MAGIC = b"\x1f\x8b"
PARQUET_MAGIC = b"PAR1"


def is_gzip(path: Path) -> bool:
    with open(path, "rb") as handle:
        return handle.read(2) == GZIP_MAGIC


def fit_row_limit(engine: str, settings) -> int:
    """Most training rows a streamed fit may hold: the memory engine's limit, or the out-of-core one."""
    if engine == "memory":
        return settings.max_fit_rows
    return max(settings.max_fit_rows, settings.max_out_of_core_rows)


class _Counted:
    """A binary reader that refuses more than ``limit`` bytes (a small gzip upload can expand enormously)."""

    def __init__(self, handle, limit: int):
        self.handle, self.limit, self.total = handle, limit, 0

    def read(self, size: int) -> bytes:
        data = self.handle.read(size)
        self.total += len(data)
        if self.total > self.limit:
            raise PayloadTooLarge(f"the upload expands to more than {self.limit} bytes (setting "
                                  "SEGSCORE_MAX_DECOMPRESSED_BYTES)")
        return data


def _cut(buffer: bytes) -> int:
    """End (exclusive) of the last complete line of ``buffer`` outside a quoted field; 0 when there is none."""
    if b'"' not in buffer:
        return buffer.rfind(b"\n") + 1
    data = np.frombuffer(buffer, dtype=np.uint8)
    newlines = np.flatnonzero(data == 10)
    if newlines.size == 0:
        return 0
    quotes_before = np.cumsum(data == 34)[newlines]
    outside = newlines[(quotes_before % 2) == 0]
    return int(outside[-1]) + 1 if outside.size else 0


def _csv_blocks(path: Path, compressed: bool, max_bytes: int) -> Iterator[tuple[bytes, bytes, int]]:
    """(header line, block of whole data lines, data lines before the block) over the file."""
    raw = gzip.open(path, "rb") if compressed else open(path, "rb")
    try:
        with raw:
            reader = _Counted(raw, max_bytes)
            buffer = b""
            header: bytes | None = None
            lines_before = 0
            while True:
                data = reader.read(BLOCK_BYTES)
                buffer += data
                end = not data
                if header is None:
                    if buffer.startswith(b"\xef\xbb\xbf"):
                        buffer = buffer[3:]              # a UTF-8 byte-order mark (spreadsheet exports)
                    newline = buffer.find(b"\n")
                    if newline < 0 and not end:
                        if len(buffer) > BLOCK_BYTES:
                            raise InvalidInput(f"line 1: the header is longer than {BLOCK_BYTES} bytes", field="body")
                        continue
                    header = buffer if newline < 0 else buffer[:newline + 1]
                    buffer = b"" if newline < 0 else buffer[newline + 1:]
                    if not header.endswith(b"\n"):
                        header += b"\n"
                cut = len(buffer) if end else _cut(buffer)
                if cut == 0 and not end:
                    if len(buffer) > BLOCK_BYTES:
                        raise InvalidInput(f"line {lines_before + 2} is longer than {BLOCK_BYTES} bytes (or opens a "
                                           "quoted field that never closes)", field="body")
                    continue
                block, buffer = buffer[:cut], buffer[cut:]
                if block or lines_before == 0:
                    yield header, block, lines_before
                lines_before += block.count(b"\n")
                if end:
                    return
    except (gzip.BadGzipFile, zlib.error) as exc:
        raise BadBody(f"the gzip-compressed upload cannot be read: {exc}") from None
    except EOFError:
        raise BadBody("the gzip-compressed upload is truncated (it ends before the end of the compressed "
                      "stream); send the whole file") from None


def _csv_frames(path: Path, compressed: bool, id_column: str | None, max_bytes: int) -> Iterator[pd.DataFrame]:
    for header, block, lines_before in _csv_blocks(path, compressed, max_bytes):
        if lines_before == 0 and not header.strip() and not block.strip():
            raise InvalidInput("the CSV body is empty", field="body")
        yield read_csv(header + block, id_column, line_offset=lines_before)


def _parquet_frames(path: Path) -> Iterator[pd.DataFrame]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(path)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise BadBody(f"the Parquet upload cannot be read: {str(exc)[:200]}") from None
    names = [str(name).strip() for name in parquet.schema_arrow.names]
    problems = [RecordProblem(None, f"column {i}", "the Parquet schema has an empty column name")
                for i, name in enumerate(names, start=1) if not name]
    problems += [RecordProblem(None, name, "the Parquet schema names this column more than once")
                 for i, name in enumerate(names) if name and name in names[:i]]
    if problems:
        raise InvalidInput(problems)
    batches = parquet.iter_batches(batch_size=PARQUET_BATCH_ROWS)
    yielded = False
    while True:
        try:
            batch = next(batches)
        except StopIteration:
            break
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise BadBody(f"the Parquet upload cannot be read: {str(exc)[:200]}") from None
        frame = batch.to_pandas()
        frame.columns = names
        yielded = True
        yield frame
    if not yielded:
        yield pd.DataFrame({name: pd.Series(dtype=float) for name in names})


def prepare_streamed_fit(upload: Path, kind: str, query: Mapping[str, str], settings, *,
                         work_dir: Path) -> tuple[MatrixFile, FitConfig, Any]:
    """A spooled fit upload (``kind`` 'csv', 'csv-gzip' or 'parquet') -> (matrix file in
    ``work_dir``, config, make_live). Parameters come from the query string, as for a CSV body in memory."""
    params = validate_model(FitRequest, _query_parameters(query))
    limit = fit_row_limit(params.engine, settings)
    if kind == "parquet":
        frames = _parquet_frames(upload)
    else:
        # Content-Encoding: gzip, or a .gz file sent as it is (recognised by its first two bytes).
        compressed = kind == "csv-gzip" or is_gzip(upload)
        frames = _csv_frames(upload, compressed, params.id_column, settings.max_decompressed_bytes)
    matrix_path = work_dir / "matrix.f64"
    features: list[str] | None = None
    problems: list[RecordProblem] = []
    moments: ColumnMoments | None = None
    n_rows = 0
    with open(matrix_path, "wb") as out:
        for frame in frames:
            if len(frame) == 0:
                continue
            if features is None:
                candidates = csv_feature_candidates(frame, params.id_column)
                features = _resolve_features(params.features, list(frame.columns), candidates, params.id_column)
                if len(features) > settings.max_features:
                    raise InvalidInput(f"{len(features)} features; at most {settings.max_features} per fit (setting "
                                       "SEGSCORE_MAX_FEATURES); name the ones to use in 'features'", field="features")
                moments = ColumnMoments(len(features))
            if n_rows + len(frame) > limit:
                raise PayloadTooLarge(f"more than {limit} records; the fit limit is {limit}"
                                      + (" with engine 'memory'" if params.engine == "memory" else ""))
            batch = batch_from_frame(frame, features, params.id_column)
            for problem in batch.problems:
                if len(problems) < MAX_LISTED_PROBLEMS:
                    problems.append(RecordProblem(None if problem.record is None else problem.record + n_rows,
                                                  problem.field, problem.message))
            if not problems:
                batch.values.tofile(out)
                moments.update(batch.values)
            n_rows += len(frame)
            if len(problems) >= MAX_LISTED_PROBLEMS:
                break
    if problems:
        raise InvalidRecords(problems)
    if n_rows == 0:
        raise InvalidInput("no records to fit", field="records")
    source = MatrixFile(matrix_path, n_rows, len(features), tuple(range(len(features))))
    dropped: tuple[tuple[str, str], ...] = ()
    if params.features is None and n_rows >= 2:
        unusable = moments.unusable(features)
        if unusable:
            keep = usable_columns(features, unusable)
            dropped = tuple(unusable.items())
            features = [features[j] for j in keep]
            source = source.select(keep)
    return source, _fit_config(params, features, settings, dropped), params.make_live


def new_upload_directory(upload_dir: Path | None) -> Path:
    """A private temporary directory for one fit (the upload, its matrix file, the engine's scratch files);
    whoever ends up owning it (the request, or the background job it starts) removes it with
    ``remove_upload_directory``."""
    return Path(tempfile.mkdtemp(prefix="segscore-fit-", dir=upload_dir))


def remove_upload_directory(path: Path) -> None:
    shutil.rmtree(path, ignore_errors=True)
