"""Local CSV files as the client reads them: gzip read transparently, and cheap checks before an upload.

``check_csv_file`` catches what would otherwise cost an upload and a refusal (or, worse, a fit that quietly
drops a column): a file that cannot be opened, an empty one, a truncated or corrupt gzip stream, bytes that are
not UTF-8 text (a Parquet file or a spreadsheet), a header that is data or has empty or repeated names, another
delimiter than the comma, rows with another field count than the header, and a column of numbers holding text.
Field counts and types are checked on the first ``sample_rows`` data rows (the server checks every row);
a gzip stream is checked to its end, since a truncation only shows there. Cell values are never quoted in a
message (they may be personal data): only line numbers and column names.
"""

from __future__ import annotations

import csv
import gzip
import io
import zlib
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO, Callable

from service.client._errors import BadFile

GZIP_MAGIC = b"\x1f\x8b"
CHUNK_BYTES = 1 << 20
# Data rows whose field counts and cell types are checked locally; the server checks the rest.
SAMPLE_ROWS = 10_000
_OTHER_DELIMITERS = ((";", "semicolons"), ("\t", "tabs"), ("|", "'|'"))


def is_gzip(path: Path) -> bool:
    """A ``.gz`` name or gzip's magic bytes at the start."""
    if path.suffix.lower() == ".gz":
        return True
    try:
        with path.open("rb") as handle:
            return handle.read(2) == GZIP_MAGIC
    except OSError:
        return False


def open_binary(path: Path) -> IO[bytes]:
    """The file's bytes, decompressed when it is gzip; BadFile when it cannot be opened."""
    try:
        return gzip.open(path, "rb") if is_gzip(path) else path.open("rb")
    except OSError as exc:
        raise BadFile(path, "file", f"cannot read the file ({exc.strerror or exc})") from None


def open_text(path: Path) -> IO[str]:
    """The file as UTF-8 text (a byte-order mark skipped), decompressed when it is gzip."""
    return io.TextIOWrapper(open_binary(path), encoding="utf-8-sig", newline="")


def csv_chunks(path: Path, progress: Callable[[int, int], None] | None = None, *,
               chunk_bytes: int = CHUNK_BYTES) -> Iterator[bytes]:
    """The CSV's bytes in chunks (decompressed from gzip), read while they are sent.

    ``progress(bytes of the file read, file size)`` follows each chunk; for a gzip file these are compressed
    bytes, so the bar still ends at the file's size."""
    total = path.stat().st_size
    with path.open("rb") as raw:
        source: IO[bytes] = gzip.GzipFile(fileobj=raw, mode="rb") if is_gzip(path) else raw
        try:
            while chunk := _read(source, path, chunk_bytes):
                yield chunk
                if progress is not None:
                    progress(raw.tell(), total)
        finally:
            source.close()


def _read(source: IO[bytes], path: Path, size: int) -> bytes:
    try:
        return source.read(size)
    except EOFError:
        raise BadFile(path, "gzip", "the gzip stream is truncated (the file ends before the compressed data "
                      "does); copy or download it again") from None
    except (gzip.BadGzipFile, zlib.error) as exc:
        raise BadFile(path, "gzip", f"the file is not valid gzip ({exc})") from None


def check_gzip(path: Path) -> None:
    """Read a gzip file to its end (constant memory): a truncated or corrupt stream is a BadFile."""
    if not is_gzip(path):
        return
    for _ in csv_chunks(path):
        pass


def check_csv_file(path: Path, *, columns: Iterable[str] | None = None, skip: Iterable[str] = (),
                   sample_rows: int | None = None) -> list[str]:
    """Check a CSV file before it is sent; return its header names. Raises BadFile naming line and problem.

    Types are checked in ``columns`` (default: every column but those in ``skip``, say the id column), on the
    first ``sample_rows`` data rows (default SAMPLE_ROWS)."""
    sample_rows = SAMPLE_ROWS if sample_rows is None else sample_rows
    check_gzip(path)
    with open_text(path) as handle:
        lines = _numbered_lines(handle, path)
        reader = csv.reader(lines, strict=True)
        try:
            header = next((row for row in reader if row), None)
            if header is None:
                raise BadFile(path, "empty", "the file is empty; expected a header row and data rows")
            header_line = reader.line_num
            names = _check_header(path, [name.strip() for name in header], header_line)
            checked = [i for i, name in enumerate(names) if (name in set(columns) if columns is not None
                                                              else name not in set(skip))]
            types = _ColumnTypes(len(names))
            rows = 0
            for row in reader:
                if not row:
                    continue
                if len(row) != len(names):
                    raise BadFile(path, "delimiter", f"{len(row)} fields but the header has {len(names)} (a stray "
                                  "or missing delimiter, or an unquoted comma in a cell?)", line=reader.line_num)
                types.add(row, reader.line_num, checked)
                rows += 1
                if rows == sample_rows:
                    break
        except csv.Error as exc:
            raise BadFile(path, "delimiter", f"not valid CSV ({exc})", line=reader.line_num) from None
    if rows == 0:
        raise BadFile(path, "empty", "the file has a header but no data rows", line=header_line)
    mixed = types.first_mixed()
    if mixed is not None:
        index, line = mixed
        raise BadFile(path, "column", "holds numbers in most rows but text here; a column of numbers must hold "
                      "only numbers or empty cells (fix or blank the cell)", line=line, column=names[index])
    return names


def _numbered_lines(handle: IO[str], path: Path) -> Iterator[str]:
    number = 0
    try:
        for number, line in enumerate(handle, start=1):       # noqa: B007 - used after the loop
            yield line
    except UnicodeDecodeError:
        raise BadFile(path, "encoding", "not UTF-8 text (a binary file such as Parquet or a spreadsheet? "
                      "export it as CSV)", line=number + 1) from None
    except OSError as exc:
        raise BadFile(path, "file", f"cannot read the file ({exc.strerror or exc})") from None


def _check_header(path: Path, names: list[str], line: int) -> list[str]:
    if len(names) == 1:
        for delimiter, shown in _OTHER_DELIMITERS:
            if delimiter in names[0]:
                raise BadFile(path, "delimiter", f"one column whose name contains {shown}; the file must be "
                              "comma-separated (export with ',' as the delimiter)", line=line)
    if any(_is_number(name) for name in names if name):
        raise BadFile(path, "header", "the first row holds numbers, not column names: the file must start with "
                      "a header row naming the columns", line=line)
    for position, name in enumerate(names, start=1):
        if not name:
            raise BadFile(path, "header", f"column {position} has no name (a trailing comma, or a row index "
                          "written without a name?)", line=line)
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise BadFile(path, "header", "this column name appears more than once", line=line, column=name)
        seen.add(name)
    return names


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


class _ColumnTypes:
    """Per column: how many cells were numbers, how many text, and the line of the first text cell."""

    def __init__(self, n_columns: int) -> None:
        self.numbers = [0] * n_columns
        self.texts = [0] * n_columns
        self.first_text_line: list[int | None] = [None] * n_columns

    def add(self, row: list[str], line: int, indices: list[int]) -> None:
        for i in indices:
            cell = row[i].strip()
            if not cell:
                continue
            if _is_number(cell):
                self.numbers[i] += 1
            else:
                self.texts[i] += 1
                if self.first_text_line[i] is None:
                    self.first_text_line[i] = line

    def first_mixed(self) -> tuple[int, int] | None:
        """The column (index, line of its first text cell) where numbers outnumber text cells, if any."""
        mixed = [(line, i) for i, line in enumerate(self.first_text_line)
                 if line is not None and self.numbers[i] > self.texts[i]]
        if not mixed:
            return None
        line, index = min(mixed)
        return index, line
