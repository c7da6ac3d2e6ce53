"""Records -> a float matrix with NaN for missing values, checked column by column.

Two inputs arrive here: a list of JSON objects (already parsed) and CSV bytes. Both become a
``Batch``: a ``(n_records, n_features)`` float64 matrix in which NaN means *missing* (JSON null,
absent key, or empty CSV cell), the ids to echo back, and a list of per-record problems. Values
that are present but non-numeric or non-finite are problems, never silently missing.

JSON records are converted as one table (one type check over every value, one array build); only
a column that fails that check is walked value by value to name the offending records. CSV columns
are validated as whole arrays the same way.

Limits checked here, each a 422 naming record and field: a number's magnitude (``MAX_ABS_VALUE``: its square
and the fit's sums must stay finite), ids (a string or an integer of at most 64 bits), and, for CSV, the
layout itself (UTF-8, comma-separated, unique header names, every row as many fields as the header).
"""

from __future__ import annotations

import csv
import difflib
import io
import math
import re
from dataclasses import dataclass, field
from itertools import chain
from operator import itemgetter
from typing import Any, Sequence

import numpy as np
import pandas as pd

from service.errors import BadBody, FeatureMismatch, InvalidInput, InvalidRecords, PayloadTooLarge, RecordProblem

_NUMBER_TYPES = frozenset({int, float, type(None)})
_PLAIN_TYPES = frozenset({int, float})
MAX_LISTED_PROBLEMS = 200
# Largest magnitude accepted for a value. The fit squares values and sums the squares over up to a million
# records and a thousand features (1e100^2 * 1e6 * 1e3 = 1e209), and assign divides by a training standard
# deviation; 1e100 leaves those finite with a margin of ~1e99 below float64's 1.8e308. No customer measurement
# comes near it: a larger value is a unit or parsing error.
MAX_ABS_VALUE = 1e100
# Ids are echoed as JSON: a string, or an integer that every JSON library reads exactly (64 bits).
MIN_ID, MAX_ID = -(2 ** 63), 2 ** 64 - 1
_PLAIN_INTEGER = re.compile(r"-?(0|[1-9][0-9]*)")


@dataclass
class Batch:
    values: np.ndarray                       # (n_records, n_features), NaN = missing
    ids: list[Any]                           # id_column values, or row indices
    problems: list[RecordProblem] = field(default_factory=list)
    # False only where the reader knows the matrix holds no NaN (every value a plain number): the route's
    # missing-value count is then skipped. True is always safe.
    may_have_nan: bool = True

    @property
    def bad_rows(self) -> np.ndarray:
        rows = sorted({p.record for p in self.problems if p.record is not None})
        return np.asarray(rows, dtype=np.intp)

    def raise_if_problems(self) -> None:
        if self.problems:
            raise InvalidRecords(self.problems[:MAX_LISTED_PROBLEMS])


def _describe(value: Any) -> str:
    if isinstance(value, bool):
        return "expected a number, got a boolean"
    if isinstance(value, str):
        return "expected a number, got a string"
    if isinstance(value, float) and not math.isfinite(value):
        return f"value must be finite, got {value}"
    return f"expected a number, got {type(value).__name__}"


def _column_from_objects(column: list[Any], name: str, problems: list[RecordProblem]) -> np.ndarray:
    """JSON values of one feature -> float64 array (None -> NaN); bad values become problems."""
    if set(map(type, column)) <= _NUMBER_TYPES:
        try:
            array = np.array(column, dtype=np.float64)
        except OverflowError:  # an int beyond float64 range
            array = None
        if array is not None:
            suspicious = np.flatnonzero(~(np.abs(array) <= MAX_ABS_VALUE))    # NaN, infinite or too large
            if suspicious.size == 0 or all(column[i] is None for i in suspicious):
                return array
    # Slow path: name every offending record.
    array = np.full(len(column), np.nan)
    for i, value in enumerate(column):
        if value is None:
            continue
        if type(value) in (int, float):
            try:
                number = float(value)
            except OverflowError:
                problems.append(RecordProblem(i, name, "value must be finite; this integer is beyond the float64 range"))
                continue
            if abs(number) <= MAX_ABS_VALUE:
                array[i] = number
            elif math.isfinite(number):
                problems.append(RecordProblem(i, name, _too_large_message()))
            else:
                problems.append(RecordProblem(i, name, f"value must be finite, got {value}"))
            continue
        else:
            problems.append(RecordProblem(i, name, _describe(value)))
    return array


def _too_large_message() -> str:
    return (f"|value| exceeds {MAX_ABS_VALUE:g}, the largest magnitude accepted (its square and the fit's sums "
            "must stay finite); check the unit")


def _flag_too_large(values: np.ndarray, features: Sequence[str], problems: list[RecordProblem]) -> None:
    """Values beyond +-MAX_ABS_VALUE become problems (and NaN in the matrix, like any bad value)."""
    with np.errstate(invalid="ignore"):
        huge = np.abs(values) > MAX_ABS_VALUE
    if huge.any():
        for i, j in zip(*np.nonzero(huge)):
            problems.append(RecordProblem(int(i), features[j], _too_large_message()))
        values[huge] = np.nan


def check_id(value: Any) -> str | None:
    """None when ``value`` is a usable id (a string, or an integer of at most 64 bits), else the reason."""
    if type(value) is str:
        return None
    if type(value) is int:
        return None if MIN_ID <= value <= MAX_ID else f"an integer id must fit in 64 bits ({MIN_ID}..{MAX_ID})"
    kind = "a boolean" if isinstance(value, bool) else type(value).__name__
    return f"an id must be a string or an integer, got {kind}"


def _ids(raw: Sequence[Any], id_column: str | None, problems: list[RecordProblem]) -> list[Any]:
    """Ids to echo: the id_column value, or the record's 0-based index when it has none (absent or null)."""
    if id_column is None:
        return list(range(len(raw)))
    ids = []
    for i, value in enumerate(raw):
        if value is None:
            ids.append(i)
            continue
        reason = check_id(value)
        if reason is not None:
            problems.append(RecordProblem(i, id_column, reason))
        ids.append(value if reason is None else i)
    return ids


def one_edit_apart(a: str, b: str) -> bool:
    """True when ``b`` is ``a`` with one character inserted, deleted or replaced (Levenshtein distance 1)."""
    if a == b or abs(len(a) - len(b)) > 1:
        return False
    if len(a) > len(b):
        a, b = b, a
    i = 0
    while i < len(a) and a[i] == b[i]:
        i += 1
    return a[i + 1:] == b[i + 1:] if len(a) == len(b) else a[i:] == b[i + 1:]


def pairs_one_edit_apart(names: Sequence[str]) -> list[tuple[str, str]]:
    """Every pair of ``names`` one edit apart, in O(len(names) x name length) rather than comparing all pairs:
    a deletion turns one into the other, or both lose the same position to the same string (a substitution)."""
    present = set(names)
    pairs: set[tuple[str, str]] = set()
    by_deletion: dict[tuple[int, str], list[str]] = {}
    for name in present:
        for i in range(len(name)):
            shorter = name[:i] + name[i + 1:]
            if shorter in present:
                pairs.add((shorter, name))
            by_deletion.setdefault((i, shorter), []).append(name)
    for group in by_deletion.values():
        group.sort()
        pairs.update((a, b) for j, a in enumerate(group) for b in group[j + 1:])
    order = {name: i for i, name in enumerate(names)}
    return sorted(((a, b) if order[a] < order[b] else (b, a) for a, b in pairs), key=lambda ab: (order[ab[0]], order[ab[1]]))


def did_you_mean(word: str, choices: Sequence[str]) -> str:
    """' (did you mean 'x'?)' for the closest of ``choices`` (difflib's ratio >= 0.6), else ''."""
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _near_key_problems(rows: list[dict[str, Any]], features: Sequence[str], id_column: str | None,
                       problems: list[RecordProblem]) -> None:
    """A feature absent from a record that holds a key one edit away from it (``tenure_month`` for
    ``tenure_months``) is a typo, not a missing value: name both. Other extra keys stay ignored."""
    wanted = set(features)
    seen: dict[tuple[str, ...], list[tuple[str, str]]] = {}
    for i, row in enumerate(rows):
        if len(row) >= len(wanted) and wanted.issubset(row):
            continue
        keys = tuple(row)
        pairs = seen.get(keys)
        if pairs is None:
            extras = [k for k in keys if k not in wanted and k != id_column]
            pairs = [(f, k) for f in features if f not in row for k in extras if one_edit_apart(f, k)] if extras else []
            seen[keys] = pairs
        for feature, key in pairs:
            problems.append(RecordProblem(i, feature, f"absent, but the record has {key!r}, one edit away: a typo? "
                                                       "(send null for a missing value)"))


def json_columns(records: Sequence[Any]) -> list[str]:
    """Column names in order of first appearance (records that are not objects are skipped)."""
    seen: dict[str, None] = {}
    for record in records:
        if isinstance(record, dict):
            for key in record:
                seen.setdefault(key, None)
    return list(seen)


def _table(rows: list[dict[str, Any]], features: Sequence[str]) -> list[tuple[Any, ...]]:
    """One tuple of feature values per record (None where a key is absent)."""
    if len(features) > 1:       # itemgetter of a single key returns the value itself, not a tuple
        try:
            return list(map(itemgetter(*features), rows))   # every record has every key: the common case
        except KeyError:
            pass
    return [tuple(map(row.get, features)) for row in rows]


def _plain_numbers(row: tuple[Any, ...]) -> bool:
    """Every value an int or float (not a bool, not None) within +-MAX_ABS_VALUE: the same test as the
    table's, on Python values (cheaper than numpy for one record). NaN and infinities fail the comparison;
    an int beyond float64's range compares False too. Any failure goes the general way, which names it."""
    for value in row:
        kind = type(value)
        if (kind is not float and kind is not int) or not -MAX_ABS_VALUE <= value <= MAX_ABS_VALUE:
            return False
    return True


@dataclass(slots=True)
class PlainRecord:
    """One JSON record that ``batch_from_json`` would read with no problem, as Python values (``plain_record``)."""

    row: tuple[Any, ...]     # the features' values in order: ints and floats, and None (missing) when ``nulls``
    ident: Any               # its id (0, its index, when the version has no id column or the record none)
    nulls: bool              # whether a feature is null

    def batch(self) -> Batch:
        """The record as ``batch_from_json([record], ...)`` reads it."""
        return Batch(np.array(self.row, dtype=np.float64)[None], [self.ident], [], may_have_nan=self.nulls)


def plain_record(record: dict[str, Any], features: Sequence[str], id_column: str | None) -> PlainRecord | None:
    """The record's values when ``batch_from_json([record], ...)`` would find no problem and every feature key
    is present (each value a plain number within range, as ``_plain_numbers``, or null), checked on Python
    values; None otherwise, and the caller goes the general way, which names what is wrong (or misspelt: an
    absent key). No array is built: a record of plain numbers can be scored from them (``assign_one``)."""
    try:
        row = itemgetter(*features)(record) if len(features) > 1 else (record[features[0]],)
    except KeyError:
        return None
    kinds = set(map(type, row))
    if kinds <= _PLAIN_TYPES:
        nulls = False
        # max may step over a NaN, a sum may not (an int beyond float64's range fails max first).
        if not (max(map(abs, row)) <= MAX_ABS_VALUE and math.isfinite(sum(row))):
            return None
    elif kinds <= _NUMBER_TYPES:
        nulls = True
        if not _plain_numbers(tuple(value for value in row if value is not None)):
            return None
    else:
        return None
    ident = 0 if id_column is None else record.get(id_column)
    if ident is None:
        ident = 0                                   # no id: the record's index, as _ids
    elif id_column is not None and check_id(ident) is not None:
        return None
    return PlainRecord(row, ident, nulls)


def _matrix_from_table(table: list[tuple[Any, ...]], features: Sequence[str],
                       problems: list[RecordProblem]) -> tuple[np.ndarray, bool]:
    """Rows of JSON values -> (n, p) float64, None -> NaN, and whether a column was redone. Checked as a whole;
    a column with a value that is not a number within +-MAX_ABS_VALUE (or None) is redone by
    ``_column_from_objects``, which names the records."""
    n, p = len(table), len(features)
    kinds = set(map(type, chain.from_iterable(table)))
    values = None
    if kinds <= _NUMBER_TYPES:
        try:
            if type(None) in kinds:
                values = np.array(table, dtype=np.float64).reshape(n, p)     # None -> NaN
            else:
                values = np.fromiter(chain.from_iterable(table), np.float64, count=n * p).reshape(n, p)
        except OverflowError:  # an int beyond float64 range
            values = None
    if values is None:
        redo = range(p)
        values = np.empty((n, p), dtype=np.float64)
    else:
        # One test finds NaN (None), infinities and values beyond MAX_ABS_VALUE alike; such columns are redone.
        redo = np.flatnonzero(~(np.abs(values) <= MAX_ABS_VALUE).all(axis=0)).tolist()
    for j in redo:
        values[:, j] = _column_from_objects([row[j] for row in table], features[j], problems)
    return values, bool(len(redo))


def batch_from_json(
    records: Sequence[Any],
    features: Sequence[str],
    id_column: str | None,
) -> Batch:
    """Parsed JSON records -> Batch. Keys outside ``features`` and ``id_column`` are ignored."""
    problems: list[RecordProblem] = []
    rows: list[dict[str, Any]] = []
    for i, record in enumerate(records):
        if isinstance(record, dict):
            rows.append(record)
        else:
            problems.append(RecordProblem(i, "", "each record must be a JSON object"))
            rows.append({})
    table = _table(rows, features)
    if len(table) == 1 and not problems and _plain_numbers(table[0]):
        # The single-record call: every value a plain number in range, checked in Python (cheaper than the
        # table's numpy checks for one row); anything else goes the general way, which names the problem.
        values, redone, complete = np.array(table, dtype=np.float64), False, True
    else:
        values, redone = _matrix_from_table(table, features, problems)
        complete = False
    if redone and np.isnan(values).any():     # a value is missing: was its key misspelt?
        _near_key_problems(rows, features, id_column, problems)
    ids = _ids([r.get(id_column) for r in rows] if id_column is not None else rows, id_column, problems)
    if problems:
        problems.sort(key=lambda p: (p.record if p.record is not None else -1))
    return Batch(values, ids, problems, may_have_nan=not complete)


def _line_of(body: bytes, offset: int) -> int:
    return body.count(b"\n", 0, offset) + 1


def _check_csv_text(body: bytes, line_offset: int = 0) -> None:
    """UTF-8 only (lone surrogates included: they are not valid UTF-8); a JSON document is not a CSV."""
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BadBody(f"line {_line_of(body, exc.start) + line_offset}: the CSV body is not valid UTF-8 "
                      f"(byte {exc.start}); send UTF-8 text") from None
    if body.lstrip()[:1] in (b"{", b"["):
        raise InvalidInput("the body looks like JSON but was sent as text/csv; send it with "
                           "'Content-Type: application/json'", field="body")


def _csv_header(body: bytes) -> list[str]:
    """Header names (stripped); refuse a header pandas would silently mangle or misread."""
    first = body.split(b"\n", 1)[0].decode("utf-8").rstrip("\r")
    try:
        names = [name.strip() for name in next(csv.reader([first], strict=True))]
    except (csv.Error, StopIteration) as exc:
        raise BadBody(f"line 1: the CSV header cannot be read: {exc}") from None
    if len(names) == 1:
        for delimiter, shown in ((";", "semicolons"), ("\t", "tabs"), ("|", "'|'")):
            if delimiter in names[0]:
                raise InvalidInput(f"line 1: the header has one column and contains {shown}; the CSV must be "
                                   "comma-separated (export with ',' as the delimiter)", field="body")
    if names and all(_is_number(name) for name in names):
        raise InvalidInput("line 1: every header name is a number: the CSV has no header row? The first line must "
                           "name the columns", field="body")
    problems = []
    for position, name in enumerate(names, start=1):
        if not name:
            problems.append(RecordProblem(None, f"column {position}", "line 1: the header has an empty column name "
                                          "(a trailing comma, or a row index written by pandas without index=False?)"))
    seen: set[str] = set()
    for name in names:
        if name and name in seen:
            problems.append(RecordProblem(None, name, "line 1: the header names this column more than once"))
        seen.add(name)
    if problems:
        raise InvalidInput(problems)
    return names


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _check_field_counts(body: bytes, n_fields: int, max_rows: int | None, line_offset: int = 0) -> None:
    """Every non-blank row has exactly as many fields as the header (else pandas would shift or pad columns);
    more than ``max_rows`` data rows is a 413 before pandas builds anything."""
    if b'"' not in body:
        # No quoting: a row's field count is its comma count + 1. Counted on the bytes with numpy.
        data = np.frombuffer(body, dtype=np.uint8)
        ends = np.flatnonzero(data == 10)
        if ends.size == 0 or ends[-1] != data.size - 1:
            ends = np.append(ends, data.size)
        starts = np.concatenate(([0], ends[:-1] + 1))
        commas = np.flatnonzero(data == 44)
        counts = np.searchsorted(commas, ends) - np.searchsorted(commas, starts)
        length = ends - starts
        has_cr = (length > 0) & (data[np.maximum(ends - 1, 0)] == 13)
        blank = (length - has_cr) == 0
        if max_rows is not None and int(np.count_nonzero(~blank)) - 1 > max_rows:
            raise PayloadTooLarge(f"the CSV has {int(np.count_nonzero(~blank)) - 1} rows; the limit is {max_rows}")
        bad = np.flatnonzero((counts != n_fields - 1) & ~blank)
        if bad.size:
            line = int(bad[0]) + 1 + line_offset
            raise InvalidInput(f"line {line} has {int(counts[bad[0]]) + 1} fields but the header has {n_fields} "
                               f"({bad.size} such line(s); a trailing comma or a stray delimiter?)", field="body")
        return
    reader = csv.reader(io.StringIO(body.decode("utf-8"), newline=""), strict=True)
    try:
        for number, row in enumerate(reader):
            if max_rows is not None and number > max_rows:
                raise PayloadTooLarge(f"the CSV has more than {max_rows} rows; the limit is {max_rows}")
            if row and len(row) != n_fields:
                raise InvalidInput(f"line {reader.line_num + line_offset} has {len(row)} fields but the header has {n_fields} "
                                   "(a trailing comma or a stray delimiter?)", field="body")
    except csv.Error as exc:
        raise BadBody(f"line {reader.line_num + line_offset}: the body is not valid CSV: {exc}") from None


def read_csv(body: bytes, id_column: str | None = None, *, max_rows: int | None = None,
             line_offset: int = 0) -> pd.DataFrame:
    """CSV bytes with a header row -> DataFrame; only empty cells are missing.

    The ``id_column`` (when given and present) is read as text, so a long numeric id is not turned into a float.
    ``line_offset``: lines of the file before this body's second line (a block of a streamed file, sent with
    the header), added to the line numbers of messages.
    """
    if body.startswith(b"\xef\xbb\xbf"):
        body = body[3:]                         # a UTF-8 byte-order mark (spreadsheet exports)
    if not body.strip():
        raise InvalidInput("the CSV body is empty", field="body")
    _check_csv_text(body, line_offset)
    names = _csv_header(body)
    _check_field_counts(body, len(names), max_rows, line_offset)
    dtype = {id_column: str} if id_column is not None and id_column in names else None
    try:
        frame = pd.read_csv(io.BytesIO(body), keep_default_na=False, na_values=[""], index_col=False, dtype=dtype)
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise BadBody(f"the body is not valid CSV: {str(exc)[:200]}") from None
    except pd.errors.EmptyDataError:
        raise InvalidInput("the CSV body has no header row", field="body") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


def csv_id(value: Any) -> Any:
    """A CSV id cell as echoed: a plain decimal integer within 64 bits as a number, anything else as its text."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    if isinstance(value, str):
        text = value.strip()
        if _PLAIN_INTEGER.fullmatch(text) and len(text) <= 20 and MIN_ID <= int(text) <= MAX_ID:
            return int(text)
        return value
    if isinstance(value, (bool, np.bool_)):
        return str(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    return str(value)


def numeric_csv_columns(frame: pd.DataFrame, exclude: str | None) -> list[str]:
    """Numeric columns (an all-empty column reads as numeric: the fit then drops it with a warning)."""
    return [
        c for c in frame.columns
        if c != exclude and pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
    ]


def batch_from_frame(frame: pd.DataFrame, features: Sequence[str], id_column: str | None) -> Batch:
    """A DataFrame read from CSV -> Batch. Every feature column must be present."""
    absent = [f for f in features if f not in frame.columns]
    if absent:
        extra = [c for c in frame.columns if c not in set(features) and c != id_column]
        raise FeatureMismatch([RecordProblem(None, f, "required column is absent from the CSV header"
                                             + did_you_mean(f, extra)) for f in absent])
    if id_column is not None and id_column not in frame.columns:
        raise FeatureMismatch([RecordProblem(None, id_column, "id_column is absent from the CSV header")])
    problems: list[RecordProblem] = []
    values = np.empty((len(frame), len(features)), dtype=np.float64)
    for j, name in enumerate(features):
        column = frame[name]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            values[:, j] = column.to_numpy(dtype=np.float64, na_value=np.nan)
            for i in np.flatnonzero(np.isinf(values[:, j])):
                problems.append(RecordProblem(int(i), name, f"value must be finite, got {values[i, j]}"))
                values[i, j] = np.nan       # a bad value is NaN in the matrix, as in the JSON path
            continue
        array = np.full(len(column), np.nan)
        for i, raw in enumerate(column.tolist()):
            if raw is None or (isinstance(raw, float) and math.isnan(raw)):
                continue
            if isinstance(raw, bool):  # pandas reads a column of True/False as booleans
                problems.append(RecordProblem(i, name, "expected a number, got a boolean"))
                continue
            try:
                number = float(raw)
            except (TypeError, ValueError):
                problems.append(RecordProblem(i, name, "expected a number, got a string"))
                continue
            if not math.isfinite(number):
                problems.append(RecordProblem(i, name, f"value must be finite, got {raw}"))
                continue
            array[i] = number
        values[:, j] = array
    _flag_too_large(values, features, problems)
    raw_ids = [csv_id(v) for v in frame[id_column].tolist()] if id_column is not None else range(len(frame))
    ids = _ids(raw_ids, id_column, problems)
    problems.sort(key=lambda p: (p.record if p.record is not None else -1))
    return Batch(values, ids, problems)
