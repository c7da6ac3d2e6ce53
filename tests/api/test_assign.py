"""POST /v1/segmentations/{name}/assign through the HTTP app (TestClient).

Outside references, named beside each check: the scikit-learn objects stored in the version's bundle
(SimpleImputer, scaler, PCA, KMeans, and sklearn.pipeline.Pipeline.predict of those objects; for agglomerative
bundles sklearn.neighbors.NearestCentroid on the clusterer's labels), numpy.nanmedian, the Wine and Iris data
sets shipped with scikit-learn, RFC 8259 (JSON has no NaN or Infinity), RFC 9110 (413 Content Too Large) and,
for the shape of error items, common practice (no single source) as API.md fixes it.
"""

from __future__ import annotations

import json
import math

import joblib
import numpy as np
import orjson
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from sklearn.utils import Bunch

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from
from tests.core.test_assign import COMPONENTS, METHODS, SCALINGS, evaluation_rows, sklearn_reference

RESULT_FIELDS = {"id", "segment", "label", "distance", "outlier", "outlier_reasons", "runner_up", "margin",
                 "residual", "imputed"}
RTOL = 1e-9


# --------------------------------------------------------------------------- helpers
def fit(client, name: str, data, **params) -> dict:
    body = {"records": records_from(data, id_prefix="t"), "id_column": "id", "k": 3, **params}
    response = client.post(f"/v1/segmentations/{name}/fit", json=body)
    assert response.status_code == 201, response.text
    return response.json()


def rows_to_records(x: np.ndarray, names, id_prefix: str | None = None) -> list[dict]:
    """A matrix -> JSON records (``records_from`` takes scikit-learn Bunches)."""
    return records_from(Bunch(data=np.asarray(x), feature_names=list(names)), id_prefix=id_prefix)


def assign_json(client, name: str, records, query: str = ""):
    return client.post(f"/v1/segmentations/{name}/assign{query}", content=orjson.dumps({"records": records}),
                       headers={"content-type": "application/json"})


def post_raw(client, name: str, content: bytes | str, content_type: str = "application/json", query: str = ""):
    return client.post(f"/v1/segmentations/{name}/assign{query}", content=content,
                       headers={"content-type": content_type})


def bundle_of(client, name: str, version: int = 1):
    """The fitted scikit-learn objects of a version: the analysts' joblib file, which the server never reads
    (the server answers from the pickle-free serving artifact; these tests compare the two)."""
    return joblib.load(client.app.state.store.fitted_path(name, version))


def columns(results: list[dict]) -> dict[str, np.ndarray]:
    return {key: np.array([r[key] for r in results]) for key in ("segment", "distance", "runner_up", "margin",
                                                                  "residual", "outlier")}


def assert_results_match(bundle, training: np.ndarray, x: np.ndarray, results: list[dict]) -> None:
    """Reference: sklearn_reference (the stored scikit-learn objects and Pipeline.predict)."""
    ref = sklearn_reference(bundle, training, x)
    got = columns(results)
    np.testing.assert_array_equal(got["segment"], ref["labels"])
    np.testing.assert_array_equal(got["segment"], ref["pipeline_labels"])
    np.testing.assert_allclose(got["distance"], ref["distance"], rtol=RTOL, atol=0)
    np.testing.assert_array_equal(got["runner_up"], ref["runner_up"])
    np.testing.assert_allclose(got["margin"], ref["runner_distance"] - ref["distance"], rtol=0,
                               atol=RTOL * ref["runner_distance"].max())
    np.testing.assert_allclose(got["residual"], ref["residual"], rtol=RTOL, atol=RTOL * ref["scaled_norm"].max())
    # outlier_reasons from the reference distances and the stored thresholds (rows within rounding skipped).
    thresholds = bundle.distance_thresholds[ref["labels"]]
    limits = bundle.residual_thresholds[ref["labels"]]                # per segment (issue 8)
    drops = bundle.pca is not None and bundle.pca.n_components_ < len(bundle.features)
    for i, result in enumerate(results):
        near_limit = abs(ref["distance"][i] - thresholds[i]) <= RTOL * thresholds[i] or (
            drops and abs(ref["residual"][i] - limits[i]) <= RTOL * limits[i])
        if near_limit:
            continue
        expected = (["distance"] if ref["distance"][i] > thresholds[i] else []) + (
            ["residual"] if drops and ref["residual"][i] > limits[i] else [])
        assert result["outlier_reasons"] == expected, (i, result)
        assert result["outlier"] is bool(expected)


@pytest.fixture(scope="module")
def app_client(tmp_path_factory):
    settings = Settings(store_dir=tmp_path_factory.mktemp("assign") / "store")
    with TestClient(create_app(settings)) as client:
        yield client


@pytest.fixture(scope="module")
def wine_client(app_client, wine):
    """A 'wine' segmentation (defaults: standard scaling, PCA 0.9, k-means k=3), id column 'id'."""
    fit(app_client, "wine", wine)
    return app_client


# --------------------------------------------------------------------------- every supported config
HTTP_CONFIGS = [
    pytest.param(scaling, components, method, id=f"{scaling}-{components}-{method}")
    for scaling in SCALINGS for components in COMPONENTS for method in METHODS
]


@pytest.mark.parametrize("scaling, components, method", HTTP_CONFIGS)
def test_assign_matches_stored_sklearn_objects(app_client, wine, scaling, components, method):
    # Reference: Wine (sklearn.datasets.load_wine); expected values from the stored scikit-learn objects.
    count = COMPONENTS[components]
    count = wine.data.shape[1] if count == "all" else count
    name = f"cfg-{scaling}-{components}-{method}".replace(".", "")
    fit(app_client, name, wine, scaling=scaling, components=count, method=method)
    x = evaluation_rows(wine.data)
    records = rows_to_records(x, wine.feature_names, id_prefix="r")
    response = assign_json(app_client, name, records)
    assert response.status_code == 200, response.text
    body = response.json()
    assert (body["name"], body["version"], body["errors"]) == (name, 1, [])
    assert [r["id"] for r in body["results"]] == [f"r{i}" for i in range(x.shape[0])]
    assert_results_match(bundle_of(app_client, name), wine.data, x, body["results"])


def test_assign_response_follows_the_contract(wine_client, wine):
    # Reference: Pipeline.predict of the stored objects for the segment; API.md for the fields; RFC 8259 for
    # numbers (no NaN/Infinity).
    response = assign_json(wine_client, "wine", records_from(wine, id_prefix="w")[:5])
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/json"
    body = response.json()
    assert set(body) == {"name", "version", "results", "errors"}
    for result in body["results"]:
        assert set(result) == RESULT_FIELDS
        assert isinstance(result["segment"], int) and isinstance(result["runner_up"], int)
        assert result["label"] is None and result["imputed"] == []
        assert all(math.isfinite(result[k]) for k in ("distance", "margin", "residual"))
        assert result["margin"] >= 0
    assert_results_match(bundle_of(wine_client, "wine"), wine.data, wine.data[:5], body["results"])


def test_assign_single_record(wine_client, wine):
    # Reference: Pipeline.predict of the stored objects on the same Wine row.
    record = records_from(wine, id_prefix="w")[100]
    response = assign_json(wine_client, "wine", [record])
    assert response.status_code == 200
    results = response.json()["results"]
    assert len(results) == 1 and results[0]["id"] == "w100"
    assert_results_match(bundle_of(wine_client, "wine"), wine.data, wine.data[100:101], results)


def test_assign_without_id_column_echoes_row_indices(app_client, iris):
    # Reference: Iris (sklearn.datasets.load_iris); API.md: without id_column the id is the row index.
    body = {"records": records_from(iris), "k": 3}
    assert app_client.post("/v1/segmentations/iris-noid/fit", json=body).status_code == 201
    response = assign_json(app_client, "iris-noid", records_from(iris)[:7])
    assert [r["id"] for r in response.json()["results"]] == list(range(7))
    assert_results_match(bundle_of(app_client, "iris-noid"), iris.data, iris.data[:7], response.json()["results"])


def test_assign_100000_records(wine_client, wine):
    # Reference: Pipeline.predict of the stored objects on 100,000 Wine rows moved by seeded noise.
    rng = np.random.default_rng(7)
    x = wine.data[rng.integers(0, wine.data.shape[0], 100_000)]
    x = x + rng.normal(scale=0.3 * wine.data.std(axis=0), size=x.shape)
    names = list(wine.feature_names)
    records = [{"id": i, **dict(zip(names, row))} for i, row in enumerate(x.tolist())]
    response = assign_json(wine_client, "wine", records)
    assert response.status_code == 200
    results = orjson.loads(response.content)["results"]
    assert len(results) == 100_000 and results[-1]["id"] == 99_999
    bundle = bundle_of(wine_client, "wine")
    ref = sklearn_reference(bundle, wine.data, x)
    np.testing.assert_array_equal([r["segment"] for r in results], ref["pipeline_labels"])
    np.testing.assert_allclose([r["distance"] for r in results], ref["distance"], rtol=RTOL)
    np.testing.assert_allclose([r["residual"] for r in results], ref["residual"], rtol=RTOL)


def test_assign_reports_segment_labels(app_client, iris):
    # Reference: Pipeline.predict of the stored objects gives the segment; its label is the one PATCHed.
    fit(app_client, "labelled", iris)
    patch = app_client.patch("/v1/segmentations/labelled/versions/1/segments/1", json={"label": "petite"})
    assert patch.status_code == 200
    results = assign_json(app_client, "labelled", records_from(iris)).json()["results"]
    ref = sklearn_reference(bundle_of(app_client, "labelled"), iris.data, iris.data)
    for result, segment in zip(results, ref["pipeline_labels"]):
        assert result["label"] == ("petite" if segment == 1 else None)


def test_assign_uses_the_version_asked_for(app_client, iris):
    # Reference: each version's own stored objects (Pipeline.predict); version 2 is fitted on two features
    # only, so the two versions differ.
    fit(app_client, "versions", iris)
    fit(app_client, "versions", iris, features=list(iris.feature_names[:2]), components=None, make_live=True)
    records = records_from(iris)
    for query, version in (("", 2), ("?version=1", 1), ("?version=2", 2)):
        body = assign_json(app_client, "versions", records, query).json()
        assert body["version"] == version
        x = iris.data if version == 1 else iris.data[:, :2]
        ref = sklearn_reference(bundle_of(app_client, "versions", version), x, x)
        np.testing.assert_array_equal([r["segment"] for r in body["results"]], ref["pipeline_labels"])


# --------------------------------------------------------------------------- CSV
def test_assign_csv_echoes_the_id_column(wine_client, wine):
    # Reference: pandas.DataFrame.to_csv writes the rows; Pipeline.predict of the stored objects labels them.
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    frame.insert(0, "id", [f"c{i}" for i in range(len(frame))])
    frame["unused"] = "ignored"
    response = post_raw(wine_client, "wine", frame.to_csv(index=False), "text/csv")
    assert response.status_code == 200, response.text
    results = response.json()["results"]
    assert [r["id"] for r in results] == list(frame["id"])
    assert_results_match(bundle_of(wine_client, "wine"), wine.data, wine.data, results)


def test_assign_csv_missing_column_is_422(wine_client, wine):
    # Reference: common practice (no single source): a required column absent from the header is named.
    frame = pd.DataFrame(wine.data, columns=wine.feature_names).drop(columns=["alcohol"])
    frame.insert(0, "id", range(len(frame)))
    response = post_raw(wine_client, "wine", frame.to_csv(index=False), "text/csv")
    assert response.status_code == 422
    assert response.json()["detail"] == [
        {"record": None, "field": "alcohol", "message": "required column is absent from the CSV header"}]


def test_assign_csv_bad_cells_name_record_and_field(wine_client, wine):
    # Reference: RFC 8259 / IEEE 754 practice: "inf" and "NaN" are not usable numbers; booleans and words are
    # not numbers (common practice, no single source). An empty cell is a missing value (API.md).
    frame = pd.DataFrame(wine.data[:4], columns=wine.feature_names)
    frame.insert(0, "id", ["a", "b", "c", "d"])
    text = frame.to_csv(index=False).splitlines()
    cells = [line.split(",") for line in text]
    cells[1][2] = "inf"         # record 0, malic_acid
    cells[2][3] = "NaN"         # record 1, ash
    cells[3][1] = "lots"        # record 2, alcohol
    cells[4][4] = ""            # record 3, alcalinity_of_ash: missing, imputed
    body = "\n".join(",".join(row) for row in cells)
    response = post_raw(wine_client, "wine", body, "text/csv")
    assert response.status_code == 422
    assert [(d["record"], d["field"]) for d in response.json()["detail"]] == [
        (0, "malic_acid"), (1, "ash"), (2, "alcohol")]
    skipped = post_raw(wine_client, "wine", body, "text/csv", "?on_error=skip").json()
    assert [r["id"] for r in skipped["results"]] == ["d"]
    assert skipped["results"][0]["imputed"] == ["alcalinity_of_ash"]


def test_assign_csv_header_only_is_422(wine_client, wine):
    # Reference: common practice (no single source): an empty batch is invalid content, not a server error.
    response = post_raw(wine_client, "wine", ",".join(["id", *wine.feature_names]) + "\n", "text/csv")
    assert response.status_code == 422
    assert response.json()["detail"][0]["field"] == "records"


# --------------------------------------------------------------------------- missing values
def test_assign_imputes_missing_values_with_training_medians(wine_client, wine):
    # Reference: numpy.nanmedian of the Wine columns, and the stored SimpleImputer + Pipeline.predict (which
    # accept NaN) on the same rows.
    names = list(wine.feature_names)
    records = records_from(wine, id_prefix="m")[:3]
    records[0][names[0]] = None                       # JSON null
    del records[1][names[2]]                          # absent key
    records[1][names[5]] = None
    response = assign_json(wine_client, "wine", records)
    assert response.status_code == 200
    results = response.json()["results"]
    assert [r["imputed"] for r in results] == [[names[0]], [names[2], names[5]], []]
    x = wine.data[:3].copy()
    x[0, 0] = x[1, 2] = x[1, 5] = np.nan
    bundle = bundle_of(wine_client, "wine")
    np.testing.assert_array_equal(bundle.imputer.statistics_, np.nanmedian(wine.data, axis=0))
    assert_results_match(bundle, wine.data, x, results)
    # Filling the holes by hand with the medians gives the same answer.
    filled = np.where(np.isnan(x), np.nanmedian(wine.data, axis=0), x)
    by_hand = assign_json(wine_client, "wine", rows_to_records(filled, names)).json()["results"]
    assert [r["segment"] for r in by_hand] == [r["segment"] for r in results]
    assert [r["distance"] for r in by_hand] == pytest.approx([r["distance"] for r in results], rel=1e-12)


def test_assign_record_missing_more_than_half_is_an_error(wine_client, wine):
    # Reference: common practice (no single source): a record mostly made of imputed values says little.
    names = list(wine.feature_names)                  # 13 features: at most 6 may be missing
    records = records_from(wine, id_prefix="h")[:3]
    for name in names[:7]:
        records[1][name] = None
    for name in names[:6]:
        records[2][name] = None
    response = assign_json(wine_client, "wine", records)
    assert response.status_code == 422
    assert response.json()["detail"] == [
        {"record": 1, "field": "", "message": "7 of 13 features are missing; at most half may be"}]
    skipped = assign_json(wine_client, "wine", records, "?on_error=skip").json()
    assert [r["id"] for r in skipped["results"]] == ["h0", "h2"]
    assert skipped["results"][1]["imputed"] == names[:6]
    assert skipped["errors"] == response.json()["detail"]


def test_assign_exactly_half_missing_is_allowed(app_client, iris):
    # Reference: common practice (no single source); with 4 Iris features, 2 missing is half (allowed), 3 is not.
    fit(app_client, "half", iris)
    names = list(iris.feature_names)
    records = records_from(iris, id_prefix="q")[:2]
    records[0][names[0]] = records[0][names[1]] = None
    records[1][names[0]] = records[1][names[1]] = records[1][names[2]] = None
    body = assign_json(app_client, "half", records, "?on_error=skip").json()
    assert [r["id"] for r in body["results"]] == ["q0"]
    assert body["results"][0]["imputed"] == names[:2]
    assert body["errors"] == [{"record": 1, "field": "", "message": "3 of 4 features are missing; at most half may be"}]


def test_assign_bad_value_is_reported_as_bad_not_as_missing(wine_client, wine):
    # Reference: common practice (no single source): one error per cause; 6 of 13 missing is allowed, so the
    # string is the record's only problem.
    names = list(wine.feature_names)
    records = records_from(wine, id_prefix="b")[:1]
    for name in names[:6]:
        records[0][name] = None
    records[0][names[6]] = "high"
    response = assign_json(wine_client, "wine", records)
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 0, "field": names[6], "message": "expected a number, got a string"}]


# --------------------------------------------------------------------------- bad values
@pytest.mark.parametrize("value, message", [
    pytest.param("12.5", "expected a number, got a string", id="string"),
    pytest.param(True, "expected a number, got a boolean", id="bool"),
    pytest.param([1.0], "expected a number, got list", id="list"),
    pytest.param({"v": 1}, "expected a number, got dict", id="object"),
])
def test_assign_non_numeric_value_is_422(wine_client, wine, value, message):
    # Reference: RFC 8259 value types: a string, boolean, array or object is not a number (a quoted number is
    # a string); common practice (no single source) not to coerce them.
    records = records_from(wine)[:3]
    records[2]["ash"] = value
    response = assign_json(wine_client, "wine", records)
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 2, "field": "ash", "message": message}]


@pytest.mark.parametrize("literal, shown", [
    pytest.param("NaN", "nan", id="NaN"),
    pytest.param("Infinity", "inf", id="Infinity"),
    pytest.param("-Infinity", "-inf", id="minus-Infinity"),
    pytest.param("1e999", "inf", id="1e999-overflows"),
])
def test_assign_non_finite_number_is_422(wine_client, wine, literal, shown):
    # Reference: RFC 8259 section 6 (NaN and Infinity are not permitted; a number beyond double range is
    # not representable). The service still reads them (fallback parser) to name record and field.
    records = records_from(wine)[:2]
    text = json.dumps({"records": records}).replace(json.dumps(records[1]["proline"]), literal)
    assert literal in text
    response = post_raw(wine_client, "wine", text)
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 1, "field": "proline", "message": f"value must be finite, got {shown}"}]


def test_assign_integer_beyond_float_range_is_422(wine_client, wine):
    # Reference: IEEE 754 binary64 tops out near 1.8e308; RFC 8259 leaves larger numbers unrepresentable.
    records = records_from(wine)[:1]
    text = json.dumps({"records": records}).replace(json.dumps(records[0]["proline"]), "1" + "0" * 400)
    response = post_raw(wine_client, "wine", text)
    assert response.status_code == 422
    assert response.json()["detail"][0]["record"] == 0 and response.json()["detail"][0]["field"] == "proline"


def test_assign_record_that_is_not_an_object_is_422(wine_client, wine):
    # Reference: API.md / RFC 8259: a record is a JSON object.
    response = assign_json(wine_client, "wine", [records_from(wine)[0], [1, 2, 3]])
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 1, "field": "", "message": "each record must be a JSON object"}]


def test_assign_on_error_skip_returns_good_results_and_errors(wine_client, wine):
    # Reference: Pipeline.predict of the stored objects for the good rows; the error items are the 422's.
    records = records_from(wine, id_prefix="s")[:6]
    records[1]["alcohol"] = "n/a"
    records[4]["hue"] = False
    failed = assign_json(wine_client, "wine", records)
    assert failed.status_code == 422
    response = assign_json(wine_client, "wine", records, "?on_error=skip")
    assert response.status_code == 200
    body = response.json()
    assert [r["id"] for r in body["results"]] == ["s0", "s2", "s3", "s5"]
    assert body["errors"] == failed.json()["detail"] == [
        {"record": 1, "field": "alcohol", "message": "expected a number, got a string"},
        {"record": 4, "field": "hue", "message": "expected a number, got a boolean"}]
    good = wine.data[[0, 2, 3, 5]]
    assert_results_match(bundle_of(wine_client, "wine"), wine.data, good, body["results"])


def test_assign_on_error_skip_with_every_record_bad(wine_client):
    # Reference: common practice (no single source): nothing to assign is an empty result list, not an error.
    response = assign_json(wine_client, "wine", [{"alcohol": "x"}], "?on_error=skip")
    assert response.status_code == 200
    body = response.json()
    assert body["results"] == [] and body["errors"]


def test_assign_empty_batch_is_422(wine_client):
    # Reference: common practice (no single source): an empty batch is invalid content.
    response = assign_json(wine_client, "wine", [])
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": None, "field": "records", "message": "the batch has no records"}]


def test_assign_invalid_json_is_400(wine_client):
    # Reference: RFC 8259 grammar; API.md: a body that is not valid JSON is 400.
    response = post_raw(wine_client, "wine", b'{"records": [{"alcohol": 1,}')
    assert response.status_code == 400
    assert "not valid JSON" in response.json()["detail"]


@pytest.mark.parametrize("body", [
    pytest.param(b"[" * 5000 + b"]" * 5000, id="deeply-nested"),
    pytest.param(b'{"records": {"a": 1}}', id="records-not-a-list"),
    pytest.param(b"[1, 2]", id="top-level-list"),
    pytest.param(b'{"rows": []}', id="no-records-key"),
    pytest.param(b'{"records": [null, 1, "x"]}', id="records-not-objects"),
    pytest.param(b"\xff\xfe\x00", id="not-utf8"),
    pytest.param(b'{"records": [{"alcohol": 1e400, "ash": -1e400}]}', id="overflowing-numbers"),
    pytest.param(b"", id="empty-body"),
])
def test_assign_bad_bodies_never_give_a_500(wine_client, body):
    # Reference: API.md / RFC 9110: client errors are 4xx; a 500 is reserved for the server's own faults.
    response = post_raw(wine_client, "wine", body)
    assert 400 <= response.status_code < 500, (response.status_code, response.text)
    assert "detail" in response.json()


# --------------------------------------------------------------------------- versions and limits
def test_assign_unknown_version_or_segmentation_is_404(wine_client, wine):
    # Reference: RFC 9110 404 Not Found; API.md: unknown segmentation/version.
    records = records_from(wine)[:1]
    assert assign_json(wine_client, "wine", records, "?version=9").status_code == 404
    assert "no version 9" in assign_json(wine_client, "wine", records, "?version=9").json()["detail"]
    assert assign_json(wine_client, "no-such-thing", records).status_code == 404


def test_assign_without_live_version_is_409(app_client, iris):
    # Reference: RFC 9110 409 Conflict; API.md: with no live version, assign without ?version= answers 409.
    fit(app_client, "not-live", iris, make_live=False)
    records = records_from(iris, id_prefix="t")[:2]
    response = assign_json(app_client, "not-live", records)
    assert response.status_code == 409
    assert "no live version" in response.json()["detail"]
    assert assign_json(app_client, "not-live", records, "?version=1").status_code == 200


def test_assign_over_the_row_limit_is_413(tmp_path, iris):
    # Reference: RFC 9110 413 Content Too Large; the limit is Settings.max_assign_rows.
    with TestClient(create_app(Settings(store_dir=tmp_path / "store", max_assign_rows=5))) as client:
        fit(client, "small", iris)
        records = records_from(iris)
        assert assign_json(client, "small", records[:5]).status_code == 200
        response = assign_json(client, "small", records[:6])
        assert response.status_code == 413
        assert response.json()["detail"] == "the batch has 6 records; the limit is 5"
        frame = pd.DataFrame(iris.data[:6], columns=iris.feature_names)
        assert post_raw(client, "small", frame.to_csv(index=False), "text/csv").status_code == 413


def test_assign_body_over_the_byte_limit_is_413(tmp_path, iris):
    # Reference: RFC 9110 413 Content Too Large; the limit is Settings.max_body_bytes (at least 1024). The
    # version is fitted by an app with the default limit on the same store.
    store = tmp_path / "store"
    with TestClient(create_app(Settings(store_dir=store))) as client:
        fit(client, "bytes", iris)
    with TestClient(create_app(Settings(store_dir=store, max_body_bytes=1024))) as client:
        small = orjson.dumps({"records": records_from(iris)[:3]})
        large = orjson.dumps({"records": records_from(iris)[:30]})
        assert len(small) < 1024 < len(large)
        assert post_raw(client, "bytes", small).status_code == 200
        response = post_raw(client, "bytes", large)
        assert response.status_code == 413
        assert response.json()["detail"] == f"the body is {len(large)} bytes; the limit is 1024"


def test_assign_query_parameters_are_checked(wine_client, wine):
    # Reference: common practice (no single source): a bad query value is a 422 naming the parameter.
    records = records_from(wine)[:1]
    assert assign_json(wine_client, "wine", records, "?on_error=ignore").status_code == 422
    assert assign_json(wine_client, "wine", records, "?version=0").status_code == 422


def test_openapi_documents_both_body_types_and_the_result(app_client):
    # Reference: the OpenAPI 3 document FastAPI serves; API.md's assign response fields.
    spec = app_client.get("/openapi.json").json()
    operation = spec["paths"]["/v1/segmentations/{name}/assign"]["post"]
    assert set(operation["requestBody"]["content"]) == {"application/json", "text/csv",
                                                        "application/vnd.apache.arrow.stream"}
    assert {p["name"] for p in operation["parameters"]} >= {"name", "version", "on_error"}
    result = spec["components"]["schemas"]["AssignResult"]
    assert set(result["properties"]) == RESULT_FIELDS
