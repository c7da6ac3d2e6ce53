"""Records -> a float matrix with NaN for missing values, checked column by column.

Two inputs arrive here: a list of JSON objects (already parsed) and CSV bytes. Both become a
``Batch``: a ``(n_records, n_features)`` float64 matrix in which NaN means *missing* (JSON null,
absent key, or empty CSV cell), the ids to echo back, and a list of per-record problems. Values
that are present but non-numeric or non-finite are problems, never silently missing.

JSON records are converted as one table (one type check over every value, one array build); only
a column that fails that check is walked value by value to name the offending records. CSV columns
are validated as whole arrays the same way.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from itertools import chain
from operator import itemgetter
from typing import Any, Sequence

import numpy as np
import pandas as pd

from service.errors import BadBody, FeatureMismatch, InvalidInput, InvalidRecords, RecordProblem

_NUMBER_TYPES = frozenset({int, float, type(None)})
MAX_LISTED_PROBLEMS = 200


@dataclass
class Batch:
    values: np.ndarray                       # (n_records, n_features), NaN = missing
    ids: list[Any]                           # id_column values, or row indices
    problems: list[RecordProblem] = field(default_factory=list)

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
            suspicious = np.flatnonzero(~np.isfinite(array))
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
            if math.isfinite(number):
                array[i] = number
                continue
            problems.append(RecordProblem(i, name, f"value must be finite, got {value}"))
        else:
            problems.append(RecordProblem(i, name, _describe(value)))
    return array


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


def _matrix_from_table(table: list[tuple[Any, ...]], features: Sequence[str],
                       problems: list[RecordProblem]) -> np.ndarray:
    """Rows of JSON values -> (n, p) float64, None -> NaN. Checked as a whole; a column with a value that
    is not a finite number (or None) is redone by ``_column_from_objects``, which names the records."""
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
        redo = np.flatnonzero(~np.isfinite(values).all(axis=0)).tolist()
    for j in redo:
        values[:, j] = _column_from_objects([row[j] for row in table], features[j], problems)
    return values


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
    values = _matrix_from_table(_table(rows, features), features, problems)
    if id_column is None:
        ids: list[Any] = list(range(len(rows)))
    else:
        ids = [r.get(id_column) for r in rows]
    problems.sort(key=lambda p: (p.record if p.record is not None else -1))
    return Batch(values, ids, problems)


def read_csv(body: bytes) -> pd.DataFrame:
    """CSV bytes with a header row -> DataFrame; only empty cells are missing."""
    if not body.strip():
        raise InvalidInput("the CSV body is empty", field="body")
    try:
        frame = pd.read_csv(io.BytesIO(body), keep_default_na=False, na_values=[""])
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise BadBody(f"the body is not valid CSV: {exc}") from None
    except pd.errors.EmptyDataError:
        raise InvalidInput("the CSV body has no header row", field="body") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


def numeric_csv_columns(frame: pd.DataFrame, exclude: str | None) -> list[str]:
    return [
        c for c in frame.columns
        if c != exclude and pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
        and frame[c].notna().any()
    ]


def batch_from_frame(frame: pd.DataFrame, features: Sequence[str], id_column: str | None) -> Batch:
    """A DataFrame read from CSV -> Batch. Every feature column must be present."""
    absent = [f for f in features if f not in frame.columns]
    if absent:
        raise FeatureMismatch([RecordProblem(None, f, "required column is absent from the CSV header") for f in absent])
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
    if id_column is None:
        ids: list[Any] = list(range(len(frame)))
    else:
        ids = [None if (isinstance(v, float) and math.isnan(v)) else v for v in frame[id_column].tolist()]
    problems.sort(key=lambda p: (p.record if p.record is not None else -1))
    return Batch(values, ids, problems)
