"""The Python client against the app, through a starlette TestClient (no network), and its error mapping."""

from __future__ import annotations

import gc
import json
import socket
import warnings

import httpx2
import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from segscore.client import (
    RESULT_COLUMNS,
    ApiError,
    BadRequest,
    Client,
    Conflict,
    Forbidden,
    InvalidInput,
    LocalInputError,
    NotFound,
    SegscoreError,
    ServerUnreachable,
    Unauthorized,
    UnexpectedResponse,
)
from service.app import STATUS_BY_ERROR, create_app
from service.client._errors import ERROR_BY_STATUS
from service.settings import Settings
from tests.conftest import create_keys, records_from

NAME = "wines"


@pytest.fixture
def api(client):
    return Client(http=client)


@pytest.fixture
def wine_frame(wine) -> pd.DataFrame:
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    frame.insert(0, "wine_id", [f"w-{i:03d}" for i in range(len(frame))])
    return frame


@pytest.fixture
def fitted(api, wine_frame):
    """Version 1 of 'wines' (k = 3, live), fitted from the frame with wine_id as id column."""
    api.fit(NAME, wine_frame, id_column="wine_id", k=3)
    return api


# ----------------------------------------------------------------------------------------------- fit
def test_fit_from_records_frame_and_csv_file_trains_on_the_same_matrix(api, wine, wine_frame, tmp_path):
    path = tmp_path / "wines.csv"
    wine_frame.to_csv(path, index=False)
    from_records = api.fit(NAME, records_from(wine), k=3)
    from_frame = api.fit(NAME, wine_frame.drop(columns="wine_id"), k=3)
    from_file = api.fit(NAME, path, id_column="wine_id", k=3)
    assert [r["version"] for r in (from_records, from_frame, from_file)] == [1, 2, 3]
    # The same training matrix, byte for byte: the CSV forms lose no float precision.
    assert from_records["data_sha256"] == from_frame["data_sha256"] == from_file["data_sha256"]
    assert from_file["id_column"] == "wine_id"


@pytest.mark.parametrize("form", ["records", "frame"])
def test_fit_parameters_reach_the_server_in_both_forms(api, wine, wine_frame, form):
    data = records_from(wine) if form == "records" else wine_frame.drop(columns="wine_id")
    features = ["alcohol", "flavanoids", "proline", "hue"]
    report = api.fit(NAME, data, features=features, k=(2, 4), components=None, scaling="robust",
                     selection="silhouette", seed=4, make_live=False)
    assert report["features"] == features and report["components"] is None
    assert [row["k"] for row in report["selection"]["curve"]] == [2, 3, 4]
    assert report["config"]["scaling"] == "robust" and report["config"]["seed"] == 4
    assert report["live"] is False
    default = api.fit(NAME, data, k=2)
    assert default["config"]["components"] == 0.9


def test_fit_refusal_raises_invalid_input_with_the_detail(api, wine_frame):
    with pytest.raises(InvalidInput) as caught:
        api.fit(NAME, wine_frame, features=["alcohol", "colour"], k=2)
    assert caught.value.status == 422
    assert caught.value.detail[0]["field"] == "features"
    assert "colour" in str(caught.value)
    assert api.segmentations() == []


def test_fit_of_a_missing_file_is_a_local_error(api, tmp_path):
    with pytest.raises(LocalInputError, match="no such file"):
        api.fit(NAME, tmp_path / "absent.csv")


def test_fit_of_an_unreadable_csv_is_a_400(api, tmp_path):
    path = tmp_path / "broken.csv"
    path.write_bytes(b'a,b\n1,"2\n3,4\n')                # an unterminated quote
    with pytest.raises(BadRequest) as caught:
        api.fit(NAME, path)
    assert caught.value.status == 400


# ----------------------------------------------------------------------------------------------- reads
def test_reads_return_the_servers_documents(fitted, client):
    assert [s["name"] for s in fitted.segmentations()] == [NAME]
    assert fitted.segmentation(NAME) == client.get(f"/v1/segmentations/{NAME}").json()
    assert [v["version"] for v in fitted.versions(NAME)] == [1]
    assert fitted.version(NAME, 1) == client.get(f"/v1/segmentations/{NAME}/versions/1").json()
    assert fitted.ready()["status"] == "ready"


def test_unknown_version_is_not_found_with_status_and_detail(fitted):
    with pytest.raises(NotFound) as caught:
        fitted.version(NAME, 9)
    assert (caught.value.status, caught.value.detail) == (404, f"segmentation '{NAME}' has no version 9")
    assert isinstance(caught.value, ApiError) and isinstance(caught.value, SegscoreError)


def test_no_live_version_is_a_conflict(api, wine_frame):
    api.fit(NAME, wine_frame, id_column="wine_id", k=2, make_live=False)
    with pytest.raises(Conflict) as caught:
        api.assign(NAME, wine_frame.head(3))
    assert caught.value.status == 409


# ----------------------------------------------------------------------------------------------- assign
def test_assign_adds_the_result_columns_of_the_servers_answer(fitted, wine_frame, client):
    frame = wine_frame.head(40).set_index(pd.RangeIndex(100, 140))      # a non-default index is kept
    out = fitted.assign(NAME, frame, batch_rows=7)
    raw = client.post(f"/v1/segmentations/{NAME}/assign",
                      json={"records": json.loads(frame.to_json(orient="records", double_precision=15))}).json()
    assert list(out.columns) == [*frame.columns, *RESULT_COLUMNS]
    assert out.index.equals(frame.index)
    pd.testing.assert_frame_equal(out[frame.columns], frame)
    for column in RESULT_COLUMNS:
        expected = [r[column] for r in raw["results"]]
        if column in ("distance", "margin", "residual"):
            assert out[column].to_numpy() == pytest.approx(expected, rel=1e-9)
        else:
            assert out[column].tolist() == expected
    assert out.attrs["version"] == 1 and out.attrs["errors"] == []


def test_assign_refuses_to_overwrite_an_input_column(fitted, wine_frame):
    frame = wine_frame.head(5).assign(segment="mine")
    with pytest.raises(LocalInputError, match="segment"):
        fitted.assign(NAME, frame)
    out = fitted.assign(NAME, frame, columns=("label", "distance"))
    assert out["segment"].tolist() == ["mine"] * 5 and list(out.columns[-2:]) == ["label", "distance"]
    with pytest.raises(LocalInputError, match="unknown result column"):
        fitted.assign(NAME, wine_frame.head(5), columns=("segment", "colour"))


def test_assign_keeps_the_first_batchs_version_when_live_changes(fitted, wine_frame):
    fitted.fit(NAME, wine_frame, id_column="wine_id", k=5, make_live=False)
    promoted = []

    def promote_after_first_batch(done, total):
        if not promoted:
            promoted.append(fitted.promote(NAME, 2)["live_version"])

    out = fitted.assign(NAME, wine_frame, batch_rows=50, progress=promote_after_first_batch)
    assert promoted == [2]
    assert out.attrs["version"] == 1
    assert out["segment"].max() <= 2                                  # version 1 has k = 3, version 2 k = 5
    assert out["segment"].tolist() == fitted.assign(NAME, wine_frame, version=1)["segment"].tolist()


def test_assign_skip_leaves_bad_rows_empty_and_numbers_them_over_all_batches(fitted, wine_frame):
    frame = wine_frame.head(30).astype({"ash": object})
    frame.loc[11, "ash"] = "n/a"
    out = fitted.assign(NAME, frame, on_error="skip", batch_rows=5)
    assert [(e["record"], e["field"]) for e in out.attrs["errors"]] == [(11, "ash")]
    assert out["segment"].isna().tolist() == [i == 11 for i in range(30)]
    assert out["distance"].notna().sum() == 29


def test_assign_failure_in_a_later_batch_names_the_row_of_the_whole_frame(fitted, wine_frame):
    frame = wine_frame.head(30).astype({"hue": object})
    frame.loc[23, "hue"] = "pale"
    with pytest.raises(InvalidInput) as caught:
        fitted.assign(NAME, frame, batch_rows=10)
    assert [(e["record"], e["field"]) for e in caught.value.detail] == [(23, "hue")]


def test_assign_csv_streams_batches_and_copies_input_cells(fitted, wine_frame, tmp_path):
    source, target = tmp_path / "in.csv", tmp_path / "out" / "tagged.csv"
    frame = wine_frame.head(45).copy()
    frame["note"] = ['has "quotes", and a comma' if i % 7 == 0 else "" for i in range(45)]
    text = frame.to_csv(index=False)
    lines = text.splitlines(keepends=True)
    source.write_text("".join(lines[:10] + ["\n"] + lines[10:]))   # a blank line is not a record
    seen = []
    summary = fitted.assign_csv(NAME, source, target, batch_rows=8, columns=("segment", "label", "distance",
                                                                              "outlier", "imputed"),
                                progress=lambda done, total: seen.append(done))
    assert summary == {"version": 1, "rows": 45, "assigned": 45, "errors": []}
    assert seen == [8, 16, 24, 32, 40, 45]
    written = pd.read_csv(target, keep_default_na=False, dtype=str)
    original = pd.read_csv(source, keep_default_na=False, dtype=str)
    pd.testing.assert_frame_equal(written[original.columns], original)
    expected = fitted.assign(NAME, frame)
    assert written["segment"].astype(int).tolist() == expected["segment"].tolist()
    assert written["distance"].astype(float).to_numpy() == pytest.approx(expected["distance"].to_numpy(), rel=1e-12)
    assert set(written["outlier"]) <= {"true", "false"} and set(written["imputed"]) == {""}


def test_assign_csv_with_a_bad_line_writes_nothing(fitted, wine_frame, tmp_path):
    source, target = tmp_path / "in.csv", tmp_path / "tagged.csv"
    lines = wine_frame.head(20).to_csv(index=False).splitlines(keepends=True)
    lines[15] = lines[15].replace(",", ";", 3)                   # line 16 of the file: another delimiter
    source.write_text("".join(lines))
    with pytest.raises(LocalInputError, match="line 16 has 11 fields; the header has 14"):
        fitted.assign_csv(NAME, source, target, batch_rows=5)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.csv", "store"]   # no output, no temporary file


def test_assign_csv_failure_on_the_server_writes_nothing(fitted, wine_frame, tmp_path):
    source, target = tmp_path / "in.csv", tmp_path / "tagged.csv"
    frame = wine_frame.head(20).astype({"proline": object})
    frame.loc[17, "proline"] = "lots"
    frame.to_csv(source, index=False)
    with pytest.raises(InvalidInput) as caught:
        fitted.assign_csv(NAME, source, target, batch_rows=5)
    assert caught.value.detail[0]["record"] == 17
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.csv", "store"]   # no output, no temporary file
    summary = fitted.assign_csv(NAME, source, target, batch_rows=5, on_error="skip")
    assert (summary["rows"], summary["assigned"], [e["record"] for e in summary["errors"]]) == (20, 19, [17])
    written = pd.read_csv(target, keep_default_na=False, dtype=str)
    assert written.loc[17, "segment"] == "" and written.loc[16, "segment"] != ""


def test_assign_csv_refuses_a_column_clash_and_an_empty_file(fitted, wine_frame, tmp_path):
    source, target = tmp_path / "in.csv", tmp_path / "tagged.csv"
    wine_frame.head(5).assign(label="x").to_csv(source, index=False)
    with pytest.raises(LocalInputError, match="label"):
        fitted.assign_csv(NAME, source, target)
    source.write_text("")
    with pytest.raises(LocalInputError, match="empty"):
        fitted.assign_csv(NAME, source, target)
    assert not target.exists()


# ----------------------------------------------------------------------------------------------- drift, labels
def test_drift_from_a_frame_is_stored_and_listed(fitted, wine_frame):
    report = fitted.drift(NAME, wine_frame)
    assert report["n_records"] == 178 and report["version"] == 1
    assert [r["id"] for r in fitted.drift_reports(NAME, limit=5)] == [report["id"]]


def test_label_promote_compare_and_carry_labels(api, wine):
    # k-means with one initialisation: seeds 0 and 2 number the same three Wine groups differently.
    api.fit(NAME, records_from(wine), k=3, n_init=1, seed=0)
    api.fit(NAME, records_from(wine), k=3, n_init=1, seed=2)
    assert api.label(NAME, 1, 0, "light")["label"] == "light"
    api.label(NAME, 1, 1, "young")
    suggestions = api.compare(NAME, 1, 2)["suggestions"]
    assert {s["label"] for s in suggestions} == {"light", "young"}
    target = {s["label"]: s["segment"] for s in suggestions}
    api.label(NAME, 2, target["young"], "kept")
    applied = api.carry_labels(NAME, 1, 2)
    assert [s["label"] for s in applied] == ["light"]              # an existing label is kept by default
    labels = {s["id"]: s["label"] for s in api.version(NAME, 2)["segments"]}
    assert labels[target["light"]] == "light" and labels[target["young"]] == "kept"
    assert [s["label"] for s in api.carry_labels(NAME, 1, 2, overwrite=True)] == ["young"]
    assert api.promote(NAME, 2)["live_version"] == 2
    assert api.label(NAME, 2, 0, None)["label"] is None


# ----------------------------------------------------------------------------------------------- auth, errors
def test_keys_and_scopes(tmp_path, wine_frame):
    keys = create_keys(tmp_path / "store", {"read": ["read"], "all": ["fit", "read", "assign", "drift"]})
    read_key, all_key = keys["read"], keys["all"]
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as secured:
        with pytest.raises(Unauthorized) as caught:
            Client(http=secured).segmentations()
        assert caught.value.status == 401
        with pytest.raises(Forbidden, match="fit"):
            Client(http=secured, key=read_key).fit(NAME, wine_frame, k=2)
        assert Client(http=secured, key=all_key).fit(NAME, wine_frame, id_column="wine_id", k=2)["version"] == 1
        assert [s["name"] for s in Client(http=secured, key=read_key).segmentations()] == [NAME]


def test_url_and_key_come_from_the_environment(monkeypatch):
    seen = []

    def answer(request: httpx2.Request) -> httpx2.Response:
        seen.append((str(request.url), request.headers.get("authorization")))
        return httpx2.Response(200, json={"segmentations": []})

    monkeypatch.setenv("SEGSCORE_URL", "http://segments.example:9000/")
    monkeypatch.setenv("SEGSCORE_API_KEY", "env-key-0123456789abcdef")
    with Client(transport=httpx2.MockTransport(answer)) as api:
        assert api.segmentations() == []
    with Client("http://other.example", key="given-key-0123456789abc",
                transport=httpx2.MockTransport(answer)) as api:
        api.segmentations()
    assert seen == [("http://segments.example:9000/v1/segmentations", "Bearer env-key-0123456789abcdef"),
                    ("http://other.example/v1/segmentations", "Bearer given-key-0123456789abc")]


def test_a_non_json_answer_is_unexpected():
    page = httpx2.MockTransport(lambda request: httpx2.Response(200, text="<html>proxy</html>",
                                                               headers={"content-type": "text/html"}))
    with pytest.raises(UnexpectedResponse, match="text/html"):
        Client("http://x.example", transport=page).segmentations()


def test_a_non_json_error_keeps_its_status():
    gateway = httpx2.MockTransport(lambda request: httpx2.Response(502, text="bad gateway"))
    with pytest.raises(ApiError) as caught:
        Client("http://x.example", transport=gateway).segmentations()
    assert (caught.value.status, caught.value.detail) == (502, "bad gateway")


def test_a_closed_port_is_unreachable():
    with socket.socket() as probe:              # bind and close: nothing listens on this port afterwards
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    with pytest.raises(ServerUnreachable, match=f"127.0.0.1:{port}"):
        Client(f"http://127.0.0.1:{port}", timeout=5).segmentations()


def test_every_client_error_status_of_the_server_has_its_own_class():
    # Like httpx's test that every lower-level exception is mapped: each 4xx the server's error table can
    # answer has a specific client class.
    for status in sorted(set(STATUS_BY_ERROR.values())):
        if status < 500:
            assert status in ERROR_BY_STATUS, status


def test_the_short_import_is_the_same_client():
    import service.client

    assert Client is service.client.Client
    assert np.all([hasattr(service.client, name) for name in service.client.__all__])


@pytest.mark.parametrize("url", ["127.0.0.1:8000", "ftp://x.example", "http://[::1"], ids=["no-scheme", "ftp", "bad"])
def test_an_unusable_url_is_a_local_error(url):
    with pytest.raises(LocalInputError, match="URL"):
        Client(url)


def test_a_file_upload_to_an_unreachable_server_leaves_no_file_open(tmp_path, wine_frame):
    path = tmp_path / "wines.csv"
    wine_frame.to_csv(path, index=False)
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ResourceWarning)     # a file closed by the collector warns
        with pytest.raises(ServerUnreachable):
            Client(f"http://127.0.0.1:{port}", timeout=5).fit(NAME, path)
        gc.collect()
    assert [str(w.message) for w in caught if issubclass(w.category, ResourceWarning) and "wines.csv" in
            str(w.message)] == []


@pytest.mark.parametrize("value", [float("nan"), np.float64("inf"), object()], ids=["nan", "numpy-inf", "object"])
def test_records_that_are_not_json_are_a_local_error(api, value):
    with pytest.raises(LocalInputError, match="None for a missing value"):
        api.fit(NAME, [{"a": 1.0, "b": value}, {"a": 2.0, "b": 1.0}])
    assert api.segmentations() == []


def test_records_may_hold_numpy_scalars(api, iris):
    records = [{"a": np.float32(x), "b": np.int64(i % 7), "c": float(y)} for i, (x, y) in enumerate(iris.data[:, :2])]
    assert api.fit(NAME, records, k=2)["n_records"] == 150


def test_a_feature_name_with_a_comma_cannot_go_in_the_csv_form(api, wine_frame):
    frame = wine_frame.rename(columns={"alcohol": "alcohol, % vol"})
    with pytest.raises(LocalInputError, match="comma"):
        api.fit(NAME, frame, features=["alcohol, % vol", "hue"], k=2)
    records = json.loads(frame[["alcohol, % vol", "hue"]].to_json(orient="records", double_precision=15))
    assert api.fit(NAME, records, features=["alcohol, % vol", "hue"], k=2)["features"] == ["alcohol, % vol", "hue"]


@pytest.mark.parametrize("form", ["file", "frame"])
def test_fit_upload_progress_counts_every_byte(api, tmp_path, form, monkeypatch):
    import service.client._client as client_module

    monkeypatch.setattr(client_module, "UPLOAD_CHUNK_BYTES", 1000)      # several chunks from a small body
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(300, 3)), columns=["a", "b", "c"])
    path = tmp_path / "rows.csv"
    frame.to_csv(path, index=False)
    seen = []
    api.fit(NAME, path if form == "file" else frame, k=2, upload_progress=lambda done, total: seen.append((done, total)))
    size = path.stat().st_size
    assert len(seen) == -(-size // 1000) and seen[-1] == (size, size)
    assert [done for done, _ in seen] == sorted(done for done, _ in seen)
