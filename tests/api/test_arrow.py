"""Arrow IPC stream bodies and answers of POST .../assign and .../drift (issue 13, columnar batch format).

Outside references, named beside each check: the Wine data set shipped with scikit-learn and the stored
scikit-learn objects (``assert_results_match``: Pipeline.predict and the objects' own transforms); the Arrow
IPC streaming format as pyarrow writes and reads it (https://arrow.apache.org/docs/format/Columnar.html);
RFC 9110 section 12.5.1 (Accept; a server may disregard it) and section 15.5.16 (415). The JSON answer of
the same records is the other side of every equality: the two formats must not differ in a single value.
"""

from __future__ import annotations

import json
import math

import numpy as np
import orjson
import pyarrow as pa
import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings
from tests.api.test_assign import assert_results_match, bundle_of, fit
from tests.api.test_drift import FEATURES as DRIFT_FEATURES
from tests.api.test_drift import draw
from tests.api.test_drift import fit as fit_drift

ARROW = "application/vnd.apache.arrow.stream"
RESULT_COLUMNS = ["id", "segment", "label", "distance", "outlier", "outlier_reasons", "runner_up", "margin",
                  "residual", "imputed"]


# --------------------------------------------------------------------------- helpers
def stream(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def read_stream(body: bytes) -> pa.Table:
    return pa.ipc.open_stream(body).read_all()


def post(client, name: str, route: str, content: bytes, content_type: str, accept: str | None = None,
         query: str = ""):
    headers = {"content-type": content_type}
    if accept is not None:
        headers["accept"] = accept
    return client.post(f"/v1/segmentations/{name}/{route}{query}", content=content, headers=headers)


def as_records(columns: dict[str, list]) -> list[dict]:
    """Columns -> JSON records; a float NaN stays NaN here (the tests decide whether it is null)."""
    names = list(columns)
    return [dict(zip(names, row)) for row in zip(*columns.values())]


def json_body(records: list[dict]) -> bytes:
    # NaN -> null: JSON's missing value, the same as an Arrow null.
    return orjson.dumps({"records": [{k: (None if isinstance(v, float) and math.isnan(v) else v)
                                      for k, v in r.items()} for r in records]})


def arrow_table(columns: dict[str, list]) -> pa.Table:
    """Float columns with NaN -> Arrow nulls (missing values), as a backend's nullable column would be."""
    arrays = {}
    for name, values in columns.items():
        if values and all(isinstance(v, float) for v in values):
            data = np.asarray(values, dtype=np.float64)
            arrays[name] = pa.array(data, mask=np.isnan(data))
        else:
            arrays[name] = pa.array(values)
    return pa.table(arrays)


def wine_columns(wine, n: int = 400, seed: int = 3) -> dict[str, list]:
    """Wine rows moved by seeded noise (some far enough to be outliers), ~3% of values missing, string ids."""
    rng = np.random.default_rng(seed)
    x = wine.data[rng.integers(0, wine.data.shape[0], n)]
    x = x + rng.normal(scale=0.4 * wine.data.std(axis=0), size=x.shape)
    x[: n // 20] *= 3.0                                      # far from every centroid: flagged
    x[rng.random(x.shape) < 0.03] = np.nan
    columns: dict[str, list] = {"id": [f"w{i}" for i in range(n)]}
    for j, name in enumerate(wine.feature_names):
        columns[name] = x[:, j].tolist()
    return columns


def results_from_arrow(body: bytes) -> tuple[list[dict], dict[bytes, bytes]]:
    table = read_stream(body)
    assert table.column_names == RESULT_COLUMNS
    return table.to_pylist(), table.schema.metadata


def assert_same_results(arrow_results: list[dict], json_results: list[dict]) -> None:
    """Arrow rows equal JSON results: exact for every field but the floats, which agree within 1e-12."""
    assert len(arrow_results) == len(json_results)
    for got, want in zip(arrow_results, json_results):
        assert got.keys() == want.keys()
        for key in ("id", "segment", "label", "outlier", "outlier_reasons", "runner_up", "imputed"):
            assert got[key] == want[key], key
        for key in ("distance", "margin", "residual"):
            if want[key] is None:
                assert got[key] is None
            else:
                assert abs(got[key] - want[key]) <= 1e-12 * max(1.0, abs(want[key])), key


@pytest.fixture(scope="module")
def app_client(tmp_path_factory):
    settings = Settings(store_dir=tmp_path_factory.mktemp("arrow") / "store", max_assign_rows=5_000)
    with TestClient(create_app(settings)) as client:
        yield client


@pytest.fixture(scope="module")
def wine_client(app_client, wine):
    fit(app_client, "wine", wine)
    patch = app_client.patch("/v1/segmentations/wine/versions/1/segments/1", json={"label": "petite"})
    assert patch.status_code == 200, patch.text
    return app_client


# --------------------------------------------------------------------------- same answers as JSON
def test_arrow_answer_equals_json_answer_on_the_same_records(wine_client, wine):
    columns = wine_columns(wine)
    records = as_records(columns)
    by_json = post(wine_client, "wine", "assign", json_body(records), "application/json")
    assert by_json.status_code == 200, by_json.text
    want = by_json.json()
    # The data really exercise every column: outliers, imputed values, a label, no label.
    assert any(r["outlier"] for r in want["results"]) and any(r["imputed"] for r in want["results"])
    assert {r["label"] for r in want["results"]} == {"petite", None}

    by_arrow = post(wine_client, "wine", "assign", stream(arrow_table(columns)), ARROW, accept=ARROW)
    assert by_arrow.status_code == 200, by_arrow.text
    assert by_arrow.headers["content-type"] == ARROW and by_arrow.headers["vary"] == "Accept"
    results, metadata = results_from_arrow(by_arrow.content)
    assert_same_results(results, want["results"])
    assert metadata == {b"name": b"wine", b"version": b"1", b"errors": b"[]"}

    # Reference: the stored scikit-learn objects (Pipeline.predict etc.) on the complete records.
    x = np.array([[columns[f][i] for f in wine.feature_names] for i in range(len(records))])
    complete = ~np.isnan(x).any(axis=1)
    assert_results_match(bundle_of(wine_client, "wine"), wine.data, x[complete],
                         [r for r, keep in zip(results, complete) if keep])

    # Mixed directions: an Arrow body answered in JSON, a JSON body answered in Arrow.
    arrow_in = post(wine_client, "wine", "assign", stream(arrow_table(columns)), ARROW)
    assert arrow_in.headers["content-type"] == "application/json"
    assert arrow_in.json() == want
    json_in = post(wine_client, "wine", "assign", json_body(records), "application/json", accept=ARROW)
    assert results_from_arrow(json_in.content)[0] == results


def test_several_record_batches_and_column_types_read_as_one_table(wine_client, wine):
    # Reference: the Arrow streaming format allows any number of record batches of one schema; integers,
    # float32 and decimals are numbers (compared with the JSON answer of the same values as float64).
    columns = wine_columns(wine, n=60, seed=5)
    names = list(wine.feature_names)
    columns["magnesium"] = [None if math.isnan(v) else round(v) for v in columns["magnesium"]]
    columns["proline"] = [None if math.isnan(v) else round(v) for v in columns["proline"]]
    table = pa.table({
        "id": pa.array(columns["id"], type=pa.large_string()),
        **{n: pa.array([None if isinstance(v, float) and math.isnan(v) else v for v in columns[n]],
                       type=pa.float64()) for n in names},
    })
    table = table.set_column(names.index("proline") + 1, "proline", pa.array(columns["proline"], type=pa.uint16()))
    table = table.set_column(names.index("magnesium") + 1, "magnesium",
                             pa.array(columns["magnesium"], type=pa.int16()).cast(pa.decimal128(7, 1)))
    columns["hue"] = [float(np.float32(v)) for v in columns["hue"]]          # what float32 holds
    table = table.set_column(names.index("hue") + 1, "hue", table.column("hue").cast(pa.float32()))
    halves = table.to_batches(max_chunksize=25)
    assert len(halves) == 3
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        for batch in halves:
            writer.write_batch(batch)
    by_arrow = post(wine_client, "wine", "assign", sink.getvalue().to_pybytes(), ARROW, accept=ARROW)
    assert by_arrow.status_code == 200, by_arrow.text
    by_json = post(wine_client, "wine", "assign", json_body(as_records(columns)), "application/json")
    assert_same_results(results_from_arrow(by_arrow.content)[0], by_json.json()["results"])


@pytest.mark.parametrize("ids", [
    pytest.param([7, 2 ** 63 + 5, None, 3], id="integers-beyond-int64-and-a-null"),
    pytest.param([1, 2, 3, 4], id="int64"),
    pytest.param(["a", None, "c", "d"], id="strings-and-a-null"),
], )
def test_ids_are_echoed_as_json_echoes_them(wine_client, wine, ids):
    # API.md: an id is a string or a 64-bit integer; a record without one gets its row index. In Arrow a
    # string id column carries that index as text (one column has one type).
    columns = wine_columns(wine, n=4, seed=9)
    columns["id"] = ids
    id_type = (pa.string() if any(isinstance(v, str) for v in ids)
               else pa.uint64() if max(v or 0 for v in ids) >= 2 ** 63 else pa.int64())
    table = arrow_table({k: v for k, v in columns.items() if k != "id"}).add_column(0, "id", pa.array(ids, id_type))
    by_json = post(wine_client, "wine", "assign", json_body(as_records(columns)), "application/json")
    want = [r["id"] for r in by_json.json()["results"]]
    got = [r["id"] for r in results_from_arrow(post(wine_client, "wine", "assign", stream(table), ARROW,
                                                    accept=ARROW).content)[0]]
    if any(isinstance(v, str) for v in ids):
        assert got == [str(v) for v in want]
    else:
        assert got == want


def test_integer_ids_that_fit_no_arrow_integer_type_are_sent_as_text(wine_client, wine):
    # -3 and 2**63 + 5 are both valid ids (API.md) but share neither int64 nor uint64.
    columns = wine_columns(wine, n=3, seed=9)
    columns["id"] = [-3, 2 ** 63 + 5, None]
    response = post(wine_client, "wine", "assign", json_body(as_records(columns)), "application/json", accept=ARROW)
    assert response.status_code == 200, response.text
    assert [r["id"] for r in results_from_arrow(response.content)[0]] == ["-3", str(2 ** 63 + 5), "2"]


def test_without_an_id_column_ids_are_row_indices(app_client, wine):
    body = {"records": [dict(zip(wine.feature_names, row)) for row in wine.data.tolist()], "k": 3}
    assert app_client.post("/v1/segmentations/wine-noid/fit", json=body).status_code == 201
    columns = wine_columns(wine, n=30, seed=4)
    del columns["id"]
    response = post(app_client, "wine-noid", "assign", stream(arrow_table(columns)), ARROW, accept=ARROW)
    results = results_from_arrow(response.content)[0]
    assert [r["id"] for r in results] == list(range(30))
    assert read_stream(response.content).schema.field("id").type == pa.int64()


def test_skip_answers_the_good_records_and_lists_the_bad_ones_as_json_does(wine_client, wine):
    columns = wine_columns(wine, n=50, seed=6)
    columns["hue"][4] = float("inf")
    columns["proline"][9] = 1e101
    # orjson cannot write Infinity; the standard library can, and the service reads it (then refuses it).
    json_text = json.dumps({"records": [{k: (None if isinstance(v, float) and math.isnan(v) else v)
                                         for k, v in r.items()} for r in as_records(columns)]}).encode()
    want = post(wine_client, "wine", "assign", json_text, "application/json", query="?on_error=skip").json()
    assert {e["record"] for e in want["errors"]} == {4, 9}
    response = post(wine_client, "wine", "assign", stream(arrow_table(columns)), ARROW, accept=ARROW,
                    query="?on_error=skip")
    results, metadata = results_from_arrow(response.content)
    assert_same_results(results, want["results"])
    assert orjson.loads(metadata[b"errors"]) == want["errors"]


# --------------------------------------------------------------------------- drift
def drift_columns(x: np.ndarray) -> dict[str, list]:
    return {f: x[:, j].tolist() for j, f in enumerate(DRIFT_FEATURES)}


def without_identity(report: dict) -> dict:
    return {k: v for k, v in report.items() if k not in ("id", "created_at")}


def assert_arrow_row_holds(row, document) -> None:
    """The Arrow row has every JSON field with the same value; a field the JSON lacks is null in Arrow (a
    struct column has every key any list item has)."""
    if isinstance(document, dict):
        assert isinstance(row, dict)
        for key, value in row.items():
            if key in document:
                assert_arrow_row_holds(value, document[key])
            else:
                assert value is None, key
        assert document.keys() <= row.keys()
    elif isinstance(document, list):
        assert isinstance(row, list) and len(row) == len(document)
        for a, b in zip(row, document):
            assert_arrow_row_holds(a, b)
    else:
        assert row == document


def test_drift_report_from_arrow_equals_the_report_from_json(client):
    fit_drift(client)
    x = draw(400, 11)
    x[:, 1] += 2.0                     # a shifted feature, so the report has something to say
    x[::17, 2] = np.nan                # missing values
    columns = drift_columns(x)
    by_json = post(client, "shoppers", "drift", json_body(as_records(columns)), "application/json")
    assert by_json.status_code == 200, by_json.text
    want = by_json.json()
    assert want["status"] != "stable"
    by_arrow = post(client, "shoppers", "drift", stream(arrow_table(columns)), ARROW)
    assert by_arrow.status_code == 200, by_arrow.text
    assert without_identity(by_arrow.json()) == without_identity(want)

    answered = post(client, "shoppers", "drift", stream(arrow_table(columns)), ARROW, accept=ARROW)
    assert answered.headers["content-type"] == ARROW
    table = read_stream(answered.content)
    assert table.num_rows == 1
    row = table.to_pylist()[0]
    assert_arrow_row_holds(without_identity(row), without_identity(want))
    stored = client.get("/v1/segmentations/shoppers/drift").json()["reports"]
    assert row["id"] in {r["id"] for r in stored}


def test_drift_refuses_a_nan_and_garbage_as_json_does(client):
    fit_drift(client)
    columns = drift_columns(draw(100, 12))
    columns["basket"][5] = float("nan")
    table = pa.table({f: pa.array(v, type=pa.float64()) for f, v in columns.items()})      # NaN, not null
    response = post(client, "shoppers", "drift", stream(table), ARROW)
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 5, "field": "basket", "message": "value must be finite, got nan"}]
    garbage = post(client, "shoppers", "drift", b"\x00" * 3 + b"not arrow at all" * 10, ARROW)
    assert garbage.status_code == 400 and "Arrow IPC stream" in garbage.json()["detail"]
    assert client.get("/v1/segmentations/shoppers/drift").json()["reports"] == []


# --------------------------------------------------------------------------- errors
def small_table(wine, n: int = 5) -> dict[str, list]:
    return wine_columns(wine, n=n, seed=8)


def test_value_errors_name_record_and_field_exactly_as_json(wine_client, wine):
    # RFC 8259 has no NaN or Infinity; the service's JSON reader accepts them only to refuse them by name.
    columns = {k: [None if isinstance(v, float) and math.isnan(v) else v for v in values]
               for k, values in small_table(wine).items()}
    columns["alcohol"][1] = float("nan")
    columns["hue"][2] = float("-inf")
    columns["proline"][3] = -1e101
    table = pa.table({k: pa.array(v, type=pa.string() if k == "id" else pa.float64()) for k, v in columns.items()})
    by_arrow = post(wine_client, "wine", "assign", stream(table), ARROW, accept=ARROW)
    by_json = post(wine_client, "wine", "assign", json.dumps({"records": as_records(columns)}).encode(),
                   "application/json")
    assert by_arrow.status_code == by_json.status_code == 422
    assert by_arrow.headers["content-type"] == "application/json"       # errors are JSON whatever the Accept
    assert by_arrow.json()["detail"] == by_json.json()["detail"]
    assert [(d["record"], d["field"]) for d in by_arrow.json()["detail"]] == [(1, "alcohol"), (2, "hue"),
                                                                            (3, "proline")]


def test_missing_column_is_422_naming_it_with_a_hint(wine_client, wine):
    columns = small_table(wine)
    columns["hues"] = columns.pop("hue")
    response = post(wine_client, "wine", "assign", stream(arrow_table(columns)), ARROW)
    assert response.status_code == 422
    [item] = response.json()["detail"]
    assert item["field"] == "hue" and "absent" in item["message"] and "'hues'" in item["message"]


@pytest.mark.parametrize("column, array, fragment", [
    ("hue", pa.array(["1.0"] * 5), "got Arrow type string"),
    ("hue", pa.array([True] * 5), "got Arrow type bool"),
    ("hue", pa.array([[1.0]] * 5), "got Arrow type list"),
    ("id", pa.array([1.5] * 5), "id column must hold integers or strings"),
], ids=["string-feature", "bool-feature", "list-feature", "float-id"])
def test_wrong_column_type_is_422_naming_column_and_type(wine_client, wine, column, array, fragment):
    table = arrow_table(small_table(wine))
    table = table.set_column(table.column_names.index(column), column, array)
    response = post(wine_client, "wine", "assign", stream(table), ARROW)
    assert response.status_code == 422, response.text
    [item] = response.json()["detail"]
    assert item["field"] == column and fragment in item["message"]


def test_duplicate_column_is_422(wine_client, wine):
    table = arrow_table(small_table(wine))
    table = table.append_column("hue", table.column("hue"))
    response = post(wine_client, "wine", "assign", stream(table), ARROW)
    assert response.status_code == 422 and response.json()["detail"][0]["field"] == "hue"


def test_too_many_rows_is_413(wine_client, wine):
    # The module's app allows 5,000 records; 5,001 rows in three record batches are counted before joining.
    columns = wine_columns(wine, n=5_001, seed=1)
    response = post(wine_client, "wine", "assign", stream(arrow_table(columns)), ARROW)
    assert response.status_code == 413 and "5000" in response.json()["detail"]


def test_body_over_the_size_limit_is_413(tmp_path, wine):
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as client:
        fit(client, "wine", wine)
    with TestClient(create_app(Settings(store_dir=tmp_path / "store", max_body_bytes=4096))) as client:
        body = stream(arrow_table(wine_columns(wine, n=200)))
        assert len(body) > 4096
        response = post(client, "wine", "assign", body, ARROW)
        assert response.status_code == 413


def test_large_body_is_parsed_and_scored_as_a_small_one(tmp_path, wine):
    # Over large_body_bytes (the minimum, 1 KiB here) the body waits for a slot and is decoded in a worker
    # thread; the answer must not change.
    columns = wine_columns(wine, n=300)
    body = stream(arrow_table(columns))
    answers = []
    for large in (1024, 64 * 1024 * 1024):
        with TestClient(create_app(Settings(store_dir=tmp_path / f"s{large}", large_body_bytes=large,
                                            inline_assign_rows=1))) as client:
            fit(client, "wine", wine)
            response = post(client, "wine", "assign", body, ARROW, accept=ARROW)
            assert response.status_code == 200, response.text
            answers.append(results_from_arrow(response.content)[0])
    assert answers[0] == answers[1]


@pytest.mark.parametrize("body, status, fragment", [
    pytest.param(b"", 422, "empty", id="empty"),
    pytest.param(b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4, 400, "not a valid Arrow IPC stream", id="garbage"),
    pytest.param(b'{"records": []}', 400, "not a valid Arrow IPC stream", id="json-sent-as-arrow"),
], )
def test_bodies_that_are_not_arrow_are_refused(wine_client, body, status, fragment):
    response = post(wine_client, "wine", "assign", body, ARROW, accept=ARROW)
    assert response.status_code == status, response.text
    detail = response.json()["detail"]
    assert fragment in (detail if isinstance(detail, str) else detail[0]["message"])


def test_truncated_stream_file_format_and_zero_rows_are_refused(wine_client, wine):
    body = stream(arrow_table(small_table(wine)))
    truncated = post(wine_client, "wine", "assign", body[: len(body) // 2], ARROW)
    assert truncated.status_code == 400 and "Arrow IPC stream" in truncated.json()["detail"]

    table = arrow_table(small_table(wine))
    sink = pa.BufferOutputStream()
    with pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    file_format = post(wine_client, "wine", "assign", sink.getvalue().to_pybytes(), ARROW)
    assert file_format.status_code == 400 and "Arrow IPC file" in file_format.json()["detail"]

    empty = post(wine_client, "wine", "assign", stream(table.slice(0, 0)), ARROW)
    assert empty.status_code == 422 and empty.json()["detail"][0]["message"] == "the batch has no records"


def test_other_content_types_are_415_naming_arrow_and_fit_does_not_take_arrow(wine_client, wine):
    # RFC 9110 section 15.5.16: 415 for a body in a format the route does not take.
    response = post(wine_client, "wine", "assign", b"x", "application/vnd.apache.arrow.file")
    assert response.status_code == 415 and ARROW in response.json()["detail"]
    fit_response = post(wine_client, "wine", "fit", stream(arrow_table(small_table(wine))), ARROW)
    assert fit_response.status_code == 415
    assert fit_response.json()["detail"].endswith("send 'application/json' or 'text/csv'")


# --------------------------------------------------------------------------- Accept negotiation
@pytest.mark.parametrize("accept, arrow_answer", [
    (None, False),
    ("*/*", False),
    ("application/json", False),
    (ARROW, True),
    (f"{ARROW}, application/json", True),
    (f"application/json;q=0.5, {ARROW}", True),
    (f"{ARROW};q=0.1, application/json", False),
    (f"{ARROW};q=0, */*", False),
    ("text/csv", False),                     # a type we cannot produce: JSON (documented), not 406
    (f"text/html, {ARROW};q=0.9", True),
    ("Application/Vnd.Apache.Arrow.Stream", True),        # media types are case-insensitive (RFC 9110 8.3.1)
])
def test_accept_chooses_the_answer_format(wine_client, wine, accept, arrow_answer):
    # RFC 9110 section 12.5.1: the highest q wins; the server may disregard an Accept it cannot meet.
    body = stream(arrow_table(small_table(wine)))
    response = post(wine_client, "wine", "assign", body, ARROW, accept=accept)
    assert response.status_code == 200
    assert response.headers["content-type"] == (ARROW if arrow_answer else "application/json")
    if arrow_answer:
        assert read_stream(response.content).num_rows == 5
    else:
        assert len(response.json()["results"]) == 5


def test_openapi_describes_arrow_bodies_and_answers(app_client):
    schema = app_client.get("/openapi.json").json()
    for route in ("assign", "drift"):
        operation = schema["paths"][f"/v1/segmentations/{{name}}/{route}"]["post"]
        assert ARROW in operation["requestBody"]["content"]
        assert ARROW in operation["responses"]["200"]["content"]
        assert "application/json" in operation["responses"]["200"]["content"]
    fit_operation = schema["paths"]["/v1/segmentations/{name}/fit"]["post"]
    assert ARROW not in fit_operation["requestBody"]["content"]


def test_compressed_streams_are_422_before_anything_is_decompressed(wine_client, wine):
    # Arrow's optional body compression (LZ4 frame, ZSTD): the decompressed size is only known afterwards.
    table = arrow_table(small_table(wine))
    for codec in ("lz4", "zstd"):
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema, options=pa.ipc.IpcWriteOptions(compression=codec)) as writer:
            writer.write_table(table)
        response = post(wine_client, "wine", "assign", sink.getvalue().to_pybytes(), ARROW)
        assert response.status_code == 422, response.text
        assert "compressed" in response.json()["detail"][0]["message"]


def test_mutated_streams_are_refused_with_a_4xx_or_read_never_crash(wine):
    # Seeded mutations of a valid stream (bytes overwritten, cut, inserted) straight into the decoder: each
    # ends as a Batch or as a ServiceError whose status is a 4xx (service.app's table), nothing else.
    from service.app import status_for
    from service.errors import ServiceError
    from service.inputs.arrow_batch import batch_from_arrow, read_arrow_stream

    columns = small_table(wine, n=40)
    body = stream(arrow_table(columns))
    features = list(wine.feature_names)
    rng = np.random.default_rng(0)
    outcomes = {"read": 0, "refused": 0}
    for _ in range(1500):
        data = bytearray(body)
        how = rng.integers(3)
        at = int(rng.integers(len(data)))
        if how == 0:
            for position in rng.integers(0, len(data), int(rng.integers(1, 8))):
                data[int(position)] = int(rng.integers(256))
        elif how == 1:
            del data[at:]
        else:
            data[at:at] = bytes(rng.integers(0, 256, int(rng.integers(1, 16)), dtype=np.uint8))
        try:
            batch_from_arrow(read_arrow_stream(bytes(data), 5_000), features, "id")
            outcomes["read"] += 1
        except ServiceError as error:
            assert 400 <= status_for(error) < 500, error
            outcomes["refused"] += 1
    assert outcomes["refused"] > 100 and sum(outcomes.values()) == 1500


# --------------------------------------------------------------------------- large bodies (issue 9's mechanism)
def two_feature_stream(n: int) -> bytes:
    return stream(pa.table({"a": pa.array([float(i % 17) for i in range(n)]),
                            "b": pa.array([float(i % 5) + 0.5 * (i % 3) for i in range(n)])}))


def two_feature_fit(client) -> None:
    records = [{"a": float(i % 17), "b": float(i % 5) + 0.5 * (i % 3)} for i in range(200)]
    assert client.post("/v1/segmentations/x/fit", json={"records": records, "k": 2}).status_code == 201


def test_large_arrow_bodies_are_decoded_in_a_worker_thread(tmp_path, monkeypatch):
    import sniffio

    import service.api.payload as payload

    where = []
    real = payload.parse_batch

    def spy(kind, *args):
        try:
            where.append((kind, sniffio.current_async_library()))
        except sniffio.AsyncLibraryNotFoundError:
            where.append((kind, "worker thread"))
        return real(kind, *args)

    monkeypatch.setattr(payload, "parse_batch", spy)
    with TestClient(create_app(Settings(store_dir=tmp_path / "s", large_body_bytes=1024))) as client:
        two_feature_fit(client)
        small, large = two_feature_stream(1), two_feature_stream(300)
        assert len(small) <= 1024 < len(large)
        for body in (small, large):
            assert post(client, "x", "assign", body, ARROW, accept=ARROW).status_code == 200
    assert where == [("arrow", "asyncio"), ("arrow", "worker thread")]


def test_large_arrow_requests_wait_for_a_large_body_slot(tmp_path, monkeypatch):
    # With large_body_concurrency = 1, a second large Arrow request waits until the first one has been decoded.
    import threading

    import service.api.payload as payload

    settings = Settings(store_dir=tmp_path / "s", large_body_bytes=1024, large_body_concurrency=1)
    inside, release, entered = [], threading.Event(), threading.Event()
    real = payload.parse_batch

    def slow(*args):
        inside.append(1)
        entered.set()
        assert release.wait(30)
        inside.append(-1)
        return real(*args)

    with TestClient(create_app(settings)) as client:
        two_feature_fit(client)
        monkeypatch.setattr(payload, "parse_batch", slow)
        results = []
        body = two_feature_stream(300)

        def send():
            results.append(post(client, "x", "assign", body, ARROW, accept=ARROW).status_code)

        threads = [threading.Thread(target=send) for _ in range(2)]
        threads[0].start()
        assert entered.wait(30)
        threads[1].start()
        threads[1].join(1.0)               # not a timing assertion: the second must not get in while we hold
        assert inside == [1]
        release.set()
        for thread in threads:
            thread.join(60)
        assert results == [200, 200] and inside == [1, -1, 1, -1]


def test_drift_arrow_answer_carries_skipped_records_and_an_all_missing_feature(client):
    fit_drift(client)
    x = draw(200, 13)
    x[:, 3] = np.nan                                 # a feature sent as nulls only (the missing-share test)
    columns = drift_columns(x)
    columns["spend"][7] = float("inf")               # one bad record, left out with on_error=skip
    import json as std_json
    records = [{k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in r.items()}
               for r in as_records(columns)]
    want = post(client, "shoppers", "drift", std_json.dumps({"records": records}).encode(), "application/json",
                query="?on_error=skip").json()
    assert want["skipped_records"] == 1 and want["errors"][0]["record"] == 7
    answered = post(client, "shoppers", "drift", stream(arrow_table(columns)), ARROW, accept=ARROW,
                    query="?on_error=skip")
    assert answered.status_code == 200, answered.text
    row = read_stream(answered.content).to_pylist()[0]
    assert_arrow_row_holds(without_identity(row), without_identity(want))
