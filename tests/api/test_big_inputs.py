"""Big inputs over HTTP: CSV, gzip CSV and Parquet fit uploads spooled to a file and read in blocks, the engine
choice, and bad files (each a 4xx naming the line or column and the problem, with nothing written).

Reference: a JSON fit of the same rows (the in-memory path) must give the same training matrix digest and the
same segments; data from scikit-learn's Iris (sklearn.datasets.load_iris) and make_blobs.
"""

from __future__ import annotations

import gzip
import json
import io

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from fastapi.testclient import TestClient
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score

import service.inputs.streamed as streamed
from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from, until_finished

NAME = "big"
PARQUET = "application/vnd.apache.parquet"


def _frame(iris) -> pd.DataFrame:
    frame = pd.DataFrame(iris.data, columns=["a", "b", "c", "d"])
    frame.insert(0, "id", [f"r{i}" for i in range(len(frame))])
    return frame


def _parquet(frame: pd.DataFrame) -> bytes:
    buffer = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), buffer, row_group_size=40)
    return buffer.getvalue()


def _post(client, body: bytes, content_type: str, query: str = "", encoding: str | None = None, name=NAME):
    headers = {"content-type": content_type}
    if encoding:
        headers["content-encoding"] = encoding
    return client.post(f"/v1/segmentations/{name}/fit{query}", content=body, headers=headers)


def _json_fit(client, iris, name="reference", **params):
    records = records_from(_frame(iris)[["a", "b", "c", "d"]].to_numpy(), feature_names=["a", "b", "c", "d"],
                           id_prefix="r")
    response = client.post(f"/v1/segmentations/{name}/fit", json={"records": records, "id_column": "id", **params})
    assert response.status_code == 201, response.text
    return response.json()


def _segment_sizes(report):
    return [(s["size"], s["centroid"]) for s in report["segments"]]


@pytest.fixture
def small_blocks(monkeypatch):
    """Blocks of ~1 KB, so a 150-row upload is read in many blocks (line numbers across block ends)."""
    monkeypatch.setattr(streamed, "BLOCK_BYTES", 1024)


@pytest.mark.parametrize("form", ["csv", "gzip-header", "gzip-file", "parquet"])
def test_streamed_upload_fits_like_json_of_the_same_rows(client, iris, small_blocks, form):
    reference = _json_fit(client, iris, k=3)
    frame = _frame(iris)
    text = frame.to_csv(index=False).encode()
    body, content_type, encoding = {
        "csv": (text, "text/csv", None),
        "gzip-header": (gzip.compress(text), "text/csv", "gzip"),
        "gzip-file": (gzip.compress(text), "text/csv", None),           # a .gz file sent as it is
        "parquet": (_parquet(frame), PARQUET, None),
    }[form]
    response = _post(client, body, content_type, "?k=3&id_column=id", encoding)
    assert response.status_code == 201, response.text
    report = response.json()
    assert report["engine"] == "memory"
    assert report["data_sha256"] == reference["data_sha256"]
    assert _segment_sizes(report) == _segment_sizes(reference)


def test_out_of_core_engine_runs_on_request_and_makes_an_ordinary_version(client, iris, small_blocks):
    reference = _json_fit(client, iris, k=3, engine="out_of_core")
    assert reference["engine"] == "out_of_core" and reference["config"]["engine"] == "out_of_core"
    response = _post(client, _frame(iris).to_csv(index=False).encode(), "text/csv",
                     "?k=3&id_column=id&engine=out_of_core")
    assert response.status_code == 201, response.text
    report = response.json()
    # The same rows through JSON and through a streamed CSV: the same matrix, so the same out-of-core fit.
    assert report["data_sha256"] == reference["data_sha256"]
    assert _segment_sizes(report) == _segment_sizes(reference)
    stored = client.get(f"/v1/segmentations/{NAME}/versions/{report['version']}").json()
    assert stored["engine"] == "out_of_core"
    summary = client.get(f"/v1/segmentations/{NAME}").json()["versions"]
    assert [row["engine"] for row in summary] == ["out_of_core"]
    # An ordinary version: assign and drift answer as for any other.
    records = records_from(iris.data[:60], feature_names=["a", "b", "c", "d"])
    assigned = client.post(f"/v1/segmentations/{NAME}/assign", json={"records": records})
    assert assigned.status_code == 200, assigned.text
    drift = client.post(f"/v1/segmentations/{NAME}/drift", json={"records": records})
    assert drift.status_code == 200, drift.text


def test_auto_engine_goes_out_of_core_above_the_setting(tmp_path):
    values, truth = make_blobs(n_samples=3000, n_features=5, centers=3, random_state=7)
    text = pd.DataFrame(values, columns=[f"f{j}" for j in range(5)]).to_csv(index=False).encode()
    settings = Settings(store_dir=tmp_path / "store", out_of_core_rows=2000)
    with TestClient(create_app(settings)) as client:
        report = _post(client, gzip.compress(text), "text/csv", "?k=2-4&selection=silhouette", "gzip").json()
        assert report["engine"] == "out_of_core" and report["k"] == 3
        assigned = client.post(f"/v1/segmentations/{NAME}/assign", content=text, headers={"content-type": "text/csv"})
        segments = [row["segment"] for row in assigned.json()["results"]]
        # Adjusted Rand index against make_blobs' own labels (sklearn.metrics.adjusted_rand_score).
        assert adjusted_rand_score(truth, segments) >= 0.95
        small = _post(client, text, "text/csv", "?k=3&engine=memory", name="small-limit")
        assert small.status_code == 201 and small.json()["engine"] == "memory"


def test_memory_engine_keeps_the_memory_row_limit(tmp_path, iris):
    settings = Settings(store_dir=tmp_path / "store", max_fit_rows=100)
    with TestClient(create_app(settings)) as client:
        text = _frame(iris).to_csv(index=False).encode()
        refused = _post(client, text, "text/csv", "?k=3&id_column=id&engine=memory")
        assert refused.status_code == 413, refused.text
        accepted = _post(client, text, "text/csv", "?k=3&id_column=id")     # auto: out of core above 100 rows
        assert accepted.status_code == 201 and accepted.json()["engine"] == "out_of_core"


# --------------------------------------------------------------------------- bad files
def _bad_cases(iris):
    frame = _frame(iris)
    text = frame.to_csv(index=False).encode()
    mixed = frame.copy()
    mixed["c"] = mixed["c"].astype(object)
    mixed.loc[120, "c"] = "n/a?"                                   # past the first blocks
    no_header = frame[["a", "b", "c", "d"]].to_csv(index=False, header=False).encode()
    return {
        # case: (body, content type, encoding, status, words the detail must hold)
        "truncated-gzip": (gzip.compress(text)[:-40], "text/csv", "gzip", 400, ["truncated"]),
        "not-gzip": (b"\x1f\x8b" + b"garbage" * 20, "text/csv", None, 400, ["gzip"]),
        "unreadable-parquet": (b"PAR1" + b"\x00" * 64, PARQUET, None, 400, ["Parquet"]),
        "parquet-cut-short": (_parquet(frame)[:-30], PARQUET, None, 400, ["Parquet"]),
        "wrong-delimiter": (text.replace(b",", b";"), "text/csv", None, 422, ["line 1", "delimiter", "comma"]),
        "missing-header": (no_header, "text/csv", None, 422, ["line 1", "header"]),
        "mixed-types": (mixed.to_csv(index=False).encode(), "text/csv", None, 422, ["string"]),
        "short-row-late": (text + b"r999,1.0,2.0\n", "text/csv", None, 422, ["line 152", "fields"]),
        "declared-gzip-but-plain": (text, "text/csv", "gzip", 400, ["gzip"]),
        "empty": (b"", "text/csv", None, 422, ["empty"]),
        "empty-gzip": (gzip.compress(b""), "text/csv", "gzip", 422, ["empty"]),
        "header-only": (b"id,a,b,c,d\n", "text/csv", None, 422, ["no records"]),
        "gzip-json": (gzip.compress(b'{"records": []}'), "application/json", "gzip", 415, ["gzip"]),
    }


@pytest.mark.parametrize("case", [
    "truncated-gzip", "not-gzip", "unreadable-parquet", "parquet-cut-short", "wrong-delimiter", "missing-header",
    "mixed-types", "short-row-late", "declared-gzip-but-plain", "empty", "empty-gzip", "header-only", "gzip-json"])
def test_bad_file_is_a_4xx_naming_the_problem_and_writes_nothing(client, iris, small_blocks, case):
    body, content_type, encoding, status, words = _bad_cases(iris)[case]
    response = _post(client, body, content_type, "" if content_type == "application/json" else "?id_column=id",
                     encoding)
    assert response.status_code == status, response.text
    detail = response.json()["detail"]
    text = " ".join(f"{item.get('field')} {item.get('message')}" if isinstance(item, dict) else str(item)
                    for item in (detail if isinstance(detail, list) else [detail]))
    for word in words:
        assert word in text, detail
    assert client.get(f"/v1/segmentations/{NAME}").status_code == 404


def test_mixed_types_name_the_record_and_column(client, iris, small_blocks):
    frame = _frame(iris)
    frame["c"] = frame["c"].astype(object)
    frame.loc[120, "c"] = "n/a?"
    response = _post(client, frame.to_csv(index=False).encode(), "text/csv", "?id_column=id")
    assert response.status_code == 422
    assert {(item["record"], item["field"]) for item in response.json()["detail"]} == {(120, "c")}


def test_body_limit_counts_the_bytes_that_arrive(tmp_path, iris):
    text = _frame(iris).to_csv(index=False).encode()
    settings = Settings(store_dir=tmp_path / "store", max_body_bytes=2048, max_decompressed_bytes=2048)
    with TestClient(create_app(settings)) as client:
        assert _post(client, text, "text/csv", "?id_column=id").status_code == 413
        # Compressed, the upload fits the body limit, but it expands past the decompressed limit.
        compressed = gzip.compress(text)
        assert len(compressed) < 2048
        refused = _post(client, compressed, "text/csv", "?id_column=id", "gzip")
        assert refused.status_code == 413 and "expands" in refused.text


def test_a_background_out_of_core_fit_of_a_streamed_upload_gives_the_synchronous_version(tmp_path, iris):
    # The job owns the upload's matrix file: the request returns at once (202), the job reads the file later,
    # and the directory is gone once the job has ended.
    upload_dir = tmp_path / "uploads"
    upload_dir.mkdir()
    body = gzip.compress(_frame(iris).to_csv(index=False).encode())
    query = "?k=3&id_column=id&engine=out_of_core"
    with TestClient(create_app(Settings(store_dir=tmp_path / "store", upload_dir=upload_dir))) as client:
        synchronous = _post(client, body, "text/csv", query, "gzip", name="sync")
        assert synchronous.status_code == 201, synchronous.text
        started = _post(client, body, "text/csv", query + "&background=true", "gzip", name="job")
        assert started.status_code == 202, started.text
        job_url = started.headers["location"]
        job = until_finished(client, job_url)
        assert job["state"] == "done", job
        report = client.get(f"/v1/segmentations/job/versions/{job['version']}").json()
        assert report["engine"] == "out_of_core"
        assert report["data_sha256"] == synchronous.json()["data_sha256"]
        assert _segment_sizes(report) == _segment_sizes(synchronous.json())
        assert list(upload_dir.iterdir()) == []


@pytest.mark.parametrize("form", ["json", "csv"])
def test_a_fit_whose_every_default_feature_is_unusable_is_refused_naming_each(client, form):
    # One all-missing and one constant column: neither carries information, so no feature is left to fit on.
    frame = pd.DataFrame({"id": [f"r{i}" for i in range(40)], "blank": [None] * 40, "flat": [2.5] * 40})
    if form == "json":
        response = client.post(f"/v1/segmentations/{NAME}/fit",
                               json={"records": frame.to_dict(orient="records"), "id_column": "id", "k": 2})
    else:
        response = _post(client, frame.to_csv(index=False).encode(), "text/csv", "?k=2&id_column=id")
    assert response.status_code == 422, response.text
    problems = response.json()["detail"]
    text = json.dumps(problems)
    assert "blank" in text and "flat" in text and "feature cannot be used" in text
    assert NAME not in json.dumps(client.get("/v1/segmentations").json())     # nothing was written
