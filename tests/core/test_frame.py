"""Records -> checked float matrix (service.core.frame), against independent parsers.

Outside references, named beside each check: pandas.DataFrame built from the same parsed records (numbers,
None and absent keys as NaN), Python's csv module with float() for CSV text, RFC 8259 for what a JSON
number is (no NaN, no Infinity; strings, booleans, arrays and objects are not numbers), IEEE 754 binary64
for the range of a float, and the Wine data set (sklearn.datasets.load_wine) as realistic values.
"""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pandas as pd
import pytest

from service.core.frame import batch_from_frame, batch_from_json, read_csv
from service.errors import BadBody, FeatureMismatch, InvalidInput

FEATURES = ["a", "b", "c"]


def pandas_reference(records: list[dict], features: list[str]) -> np.ndarray:
    """Reference: pandas builds the same table (absent keys and None become NaN)."""
    return pd.DataFrame.from_records(records).reindex(columns=features).to_numpy(dtype=np.float64)


# --------------------------------------------------------------------------- JSON records
def test_wine_records_convert_exactly(wine):
    # Reference: the Wine matrix itself, after a JSON round trip (json.dumps/json.loads keep every double).
    names = list(wine.feature_names)
    records = json.loads(json.dumps([dict(zip(names, row)) for row in wine.data.tolist()]))
    batch = batch_from_json(records, names, None)
    np.testing.assert_array_equal(batch.values, wine.data)
    assert batch.problems == [] and batch.ids == list(range(len(records)))


def test_ints_floats_nulls_absent_keys_and_extra_keys():
    # Reference: pandas.DataFrame.from_records of the same records.
    records = [
        {"a": 1, "b": 2.5, "c": -3},
        {"c": 4.0, "a": None, "b": 7},           # keys in another order; a null
        {"a": 0.5, "extra": "ignored"},          # b and c absent; an unused key
        {"a": 10**15, "b": -0.0, "c": 1e-300},
    ]
    batch = batch_from_json(records, FEATURES, None)
    np.testing.assert_array_equal(batch.values, pandas_reference(records, FEATURES))
    assert batch.problems == []


def test_one_feature_and_a_column_of_nulls():
    # Reference: pandas.DataFrame.from_records; a column of nulls is all missing, not an error.
    records = [{"a": 1.5, "b": None}, {"a": 2, "b": None}]
    np.testing.assert_array_equal(batch_from_json(records, ["a"], None).values, [[1.5], [2.0]])
    batch = batch_from_json(records, ["a", "b"], None)
    np.testing.assert_array_equal(batch.values, pandas_reference(records, ["a", "b"]))
    assert batch.problems == []


def test_ids_come_from_the_id_column_or_the_row_index():
    # API.md: "the id_column value, or row index" is echoed; a record without an id gets its 0-based index
    # (issue 7 item 9; it was null before).
    records = [{"a": 1, "b": 2, "c": 3, "id": "x"}, {"a": 1, "b": 2, "c": 3}, {"a": 1, "b": 2, "c": 3, "id": None}]
    assert batch_from_json(records, FEATURES, "id").ids == ["x", 1, 2]
    assert batch_from_json(records, FEATURES, None).ids == [0, 1, 2]


@pytest.mark.parametrize("value, message", [
    pytest.param("1.5", "expected a number, got a string", id="numeric-string"),
    pytest.param(True, "expected a number, got a boolean", id="true"),
    pytest.param(False, "expected a number, got a boolean", id="false"),
    pytest.param([1], "expected a number, got list", id="array"),
    pytest.param({"x": 1}, "expected a number, got dict", id="object"),
    pytest.param(float("nan"), "value must be finite, got nan", id="nan"),
    pytest.param(float("inf"), "value must be finite, got inf", id="inf"),
    pytest.param(-float("inf"), "value must be finite, got -inf", id="minus-inf"),
    pytest.param(10**400, "value must be finite; this integer is beyond the float64 range", id="huge-int"),
])
def test_a_value_that_is_not_a_finite_number_is_named(value, message):
    # Reference: RFC 8259 value types (only numbers are numbers; NaN/Infinity are not JSON numbers) and the
    # IEEE 754 binary64 range (about 1.8e308).
    records = [{"a": 1, "b": 2, "c": 3}, {"a": 1, "b": value, "c": 3}, {"a": 4, "b": None, "c": 6}]
    batch = batch_from_json(records, FEATURES, None)
    assert [(p.record, p.field, p.message) for p in batch.problems] == [(1, "b", message)]
    expected = pandas_reference([records[0], {"a": 1, "c": 3}, records[2]], FEATURES)
    np.testing.assert_array_equal(batch.values, expected)       # the bad cell is NaN, the rest untouched


def test_problems_are_listed_by_record_then_field():
    # Reference: common practice (no single source): errors in input order.
    records = [{"a": "x", "b": 1, "c": True}, 5, {"a": 1, "b": 2, "c": float("nan")}, {"a": 1, "b": [], "c": 3}]
    batch = batch_from_json(records, FEATURES, None)
    assert [(p.record, p.field) for p in batch.problems] == [(0, "a"), (0, "c"), (1, ""), (2, "c"), (3, "b")]
    assert batch.problems[2].message == "each record must be a JSON object"
    np.testing.assert_array_equal(batch.bad_rows, [0, 1, 2, 3])


def test_records_missing_a_key_mixed_with_full_records():
    # Reference: pandas.DataFrame.from_records (one record lacks a key: the slower path is taken).
    records = [{"a": float(i), "b": float(i) / 2, "c": -float(i)} for i in range(50)]
    del records[17]["b"]
    batch = batch_from_json(records, FEATURES, None)
    np.testing.assert_array_equal(batch.values, pandas_reference(records, FEATURES))


# --------------------------------------------------------------------------- CSV
def csv_reference(text: str, features: list[str]) -> np.ndarray:
    """Reference: Python's csv module, float() per cell, an empty cell as NaN."""
    rows = list(csv.DictReader(io.StringIO(text)))
    return np.array([[float(row[f]) if row[f] != "" else np.nan for f in features] for row in rows])


def test_csv_numbers_and_empty_cells(wine):
    # Reference: Python's csv module + float() on the text pandas.DataFrame.to_csv writes from Wine.
    names = list(wine.feature_names)
    frame = pd.DataFrame(wine.data, columns=names)
    frame.insert(0, "id", [f"w{i}" for i in range(len(frame))])
    frame = frame.astype({names[3]: object})
    frame.loc[5, names[3]] = ""                   # one empty cell: missing
    text = frame.to_csv(index=False)
    batch = batch_from_frame(read_csv(text.encode()), names, "id")
    np.testing.assert_array_equal(batch.values, csv_reference(text, names))
    assert batch.problems == [] and batch.ids[:2] == ["w0", "w1"]


@pytest.mark.parametrize("cell, message", [
    pytest.param("inf", "value must be finite, got inf", id="inf"),
    pytest.param("-Infinity", "value must be finite, got -inf", id="minus-infinity"),
    pytest.param("1e999", "value must be finite, got inf", id="overflow"),
    pytest.param("NaN", "value must be finite, got NaN", id="nan-text"),
    pytest.param("many", "expected a number, got a string", id="word"),
])
def test_csv_bad_cells_are_named(cell, message):
    # Reference: IEEE 754 (infinities and NaN are not finite numbers); a word is not a number.
    text = f"a,b,c\n1,2,3\n4,{cell},6\n"
    batch = batch_from_frame(read_csv(text.encode()), FEATURES, None)
    assert [(p.record, p.field, p.message) for p in batch.problems] == [(1, "b", message)]
    np.testing.assert_array_equal(batch.values, [[1, 2, 3], [4, np.nan, 6]])


def test_csv_boolean_column_is_not_numeric():
    # Reference: common practice (no single source): True/False are not measurements; the JSON path rejects
    # booleans too (RFC 8259 keeps them apart from numbers).
    batch = batch_from_frame(read_csv(b"a,b,c\n1,True,3\n4,False,6\n"), FEATURES, None)
    assert [(p.record, p.field) for p in batch.problems] == [(0, "b"), (1, "b")]
    assert batch.problems[0].message == "expected a number, got a boolean"


def test_csv_absent_columns_are_named():
    # Reference: common practice (no single source): each absent column named once, with no record index.
    frame = read_csv(b"a,c\n1,3\n")
    with pytest.raises(FeatureMismatch) as info:
        batch_from_frame(frame, FEATURES, None)
    assert [(p.record, p.field) for p in info.value.problems] == [(None, "b")]
    with pytest.raises(FeatureMismatch):
        batch_from_frame(read_csv(b"a,b,c\n1,2,3\n"), FEATURES, "id")


def test_csv_bodies_that_cannot_be_read():
    # Reference: RFC 4180 (a quoted field must be closed); an empty body has no header row.
    with pytest.raises(BadBody):
        read_csv(b'a,b,c\n"1,2,3\n')
    with pytest.raises(InvalidInput):
        read_csv(b"  \n")


def test_pairs_one_edit_apart_match_the_pairwise_definition():
    # Reference: the Levenshtein distance (one insertion, deletion or substitution), checked pair by pair with
    # one_edit_apart on names that include each kind of edit and near misses (a transposition is two edits).
    from service.core.frame import one_edit_apart, pairs_one_edit_apart

    names = ["tenure_months", "tenure_month", "tenure_monthz", "tenure_mnoths", "a", "b", "ab", "ba", "abc", "",
             "q1", "q2", "q10"]
    expected = {(a, b) for i, a in enumerate(names) for b in names[i + 1:] if one_edit_apart(a, b)}
    assert set(pairs_one_edit_apart(names)) == expected
    assert ("tenure_months", "tenure_month") in expected and ("ab", "ba") not in expected


def test_plain_record_is_batch_from_json_on_plain_records():
    # Reference: batch_from_json itself, the general reader (common practice: a shortcut must agree with the
    # path it shortens). Every record it takes must give the same matrix, ids and missing-value flag; every
    # record it leaves (None) must be one the general way would treat differently (a problem, an absent key).
    from service.core.frame import plain_record

    features = ["a", "b", "c"]
    taken = [{"a": 1, "b": 2.5, "c": -3e99}, {"a": None, "b": 0, "c": 1.0, "id": "x7"}, {"c": 1, "b": 2, "a": 3, "x": "y"},
             {"a": 1, "b": 2, "c": 3, "id": None}, {"a": 1, "b": 2, "c": 3, "id": 2 ** 64 - 1}]
    for id_column in (None, "id"):
        for record in taken:
            plain, general = plain_record(record, features, id_column), batch_from_json([record], features, id_column)
            assert plain is not None and not general.problems, record
            fast = plain.batch()
            np.testing.assert_array_equal(fast.values, general.values)
            assert fast.ids == general.ids and fast.may_have_nan == general.may_have_nan == plain.nulls, record
            # the row scored without an array (assign_one) holds the same numbers, in the features' order
            np.testing.assert_array_equal(np.array(plain.row, dtype=np.float64), general.values[0])
    left = [{"a": 1, "b": 2}, {"a": True, "b": 2, "c": 3}, {"a": "1", "b": 2, "c": 3}, {"a": 1e101, "b": 2, "c": 3},
            {"a": float("nan"), "b": 2, "c": 3}, {"a": 1, "b": float("inf"), "c": 3}, {"a": 1, "b": 2, "c": [3]},
            {"a": None, "b": 2, "c": -1e300}, {"a": 10 ** 400, "b": 1, "c": 2}, {"a": 1, "b": 2, "c": 3, "id": 1.5},
            {"a": 1, "b": 2, "c": 3, "id": 2 ** 64}, {"a": 1, "b": 2, "c": 3, "id": False}]
    for record in left:
        assert plain_record(record, features, "id") is None, record
        general = batch_from_json([record], features, "id")
        assert general.problems or np.isnan(general.values).any(), record
