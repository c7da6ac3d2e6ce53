"""Assign and drift answers as Apache Arrow IPC streams (when the request's Accept asks for it).

Assign: one row per assigned record, the columns of a JSON result in the same order and meaning::

    id               int64 (uint64 when an id needs it), or utf8 when any id is a string or the integers fit
                     neither (a record without an id carries its row index, as text in a utf8 column)
    segment          int64
    label            utf8, null when the segment has none
    distance         float64
    outlier          bool
    outlier_reasons  list<utf8>
    runner_up        int64, null when the version has one segment
    margin           float64, null likewise
    residual         float64
    imputed          list<utf8>

The rest of the JSON answer sits in the schema's metadata (UTF-8): ``name``, ``version`` (decimal text) and
``errors`` (the JSON text of the ``errors`` list; ``[]`` unless ``on_error=skip`` left records out).

Drift: the report as one row, each JSON field a column (objects as structs, lists as lists), so the
Arrow answer holds the same fields and values as the JSON one; a field that only some list items have is
null in the others.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc

from service.core.assign import Assignment

_REASONS = pa.array([[], ["distance"], ["residual"], ["distance", "residual"]], type=pa.list_(pa.string()))


def _stream(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def _id_array(ids: Sequence[Any], rows: np.ndarray) -> pa.Array:
    """The echoed ids as one Arrow column (see the module docstring for the type)."""
    chosen = ids if rows.size == len(ids) else [ids[i] for i in rows.tolist()]
    if isinstance(ids, range):
        return pa.array(np.asarray(chosen, dtype=np.int64))
    if set(map(type, chosen)) <= {int}:
        # Checked ids are within -2**63 .. 2**64-1; only a mix of negatives and ids over 2**63-1 fits neither
        # integer type, and goes as text like a mix of strings and integers.
        for kind in (pa.int64(), pa.uint64()):
            try:
                return pa.array(chosen, type=kind)
            except (OverflowError, pa.ArrowInvalid):
                pass
    return pa.array([value if type(value) is str else str(value) for value in chosen], type=pa.string())


def _imputed(missing: np.ndarray | None, features: Sequence[str], n: int) -> pa.Array:
    """Per record the names of the features that were imputed, as list<utf8> built from the missing mask."""
    if missing is None:
        return pa.ListArray.from_arrays(pa.array(np.zeros(n + 1, dtype=np.int32)), pa.array([], type=pa.string()))
    counts = missing.sum(axis=1, dtype=np.int32)
    offsets = np.zeros(n + 1, dtype=np.int32)
    np.cumsum(counts, out=offsets[1:])
    columns = np.nonzero(missing)[1]                   # row-major: each row's features in column order
    names = pc.take(pa.array(list(features), type=pa.string()), pa.array(columns, type=pa.int64()))
    return pa.ListArray.from_arrays(pa.array(offsets), names)


def assign_answer(name: str, version: int, features: Sequence[str], labels: dict[int, str], k: int,
                  ids: Sequence[Any], rows: np.ndarray, result: Assignment, missing: np.ndarray | None,
                  errors: list[dict[str, Any]]) -> bytes:
    """The Arrow IPC stream of an assign answer (the JSON answer's ``results`` as columns)."""
    n = int(rows.size)
    segment = pa.array(result.segment.astype(np.int64, copy=False))
    label = pc.take(pa.array([labels.get(c) for c in range(k)], type=pa.string()), segment)
    reasons = result.far.astype(np.int8) + 2 * result.off_plane.astype(np.int8)
    columns = {
        "id": _id_array(ids, rows),
        "segment": segment,
        "label": label,
        "distance": pa.array(result.distance, type=pa.float64()),
        "outlier": pa.array(reasons > 0),
        "outlier_reasons": pc.take(_REASONS, pa.array(reasons)),
        "runner_up": (pa.array(result.runner_up.astype(np.int64, copy=False)) if result.runner_up is not None
                      else pa.nulls(n, pa.int64())),
        "margin": (pa.array(result.margin, type=pa.float64()) if result.margin is not None
                   else pa.nulls(n, pa.float64())),
        "residual": pa.array(result.residual, type=pa.float64()),
        "imputed": _imputed(missing, features, n),
    }
    metadata = {"name": name, "version": str(version), "errors": orjson.dumps(errors).decode()}
    return _stream(pa.table(columns, metadata=metadata))


def drift_answer(report: dict[str, Any]) -> bytes:
    """The Arrow IPC stream of a drift report: one row, one column per top-level field."""
    return _stream(pa.Table.from_pylist([report]))
