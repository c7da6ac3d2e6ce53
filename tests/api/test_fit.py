"""POST /v1/segmentations/{name}/fit through the HTTP app: the report, CSV input, make_live, and bad input.

Reference values are recomputed here with scikit-learn (named beside each check); the bad-input cases
follow the issue's list and API.md's error contract (422 items with record index and field).
"""

from __future__ import annotations

import io
import json
import math
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from sklearn.cluster import KMeans
from sklearn.decomposition import PCA
from sklearn.metrics import silhouette_score
from sklearn.preprocessing import StandardScaler

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from, walk_numbers

NAME = "shop"
REPORT_FIELDS = {
    "name", "version", "created_at", "live", "n_records", "features", "id_column", "config", "components",
    "explained_variance_ratio", "k", "selection", "distortion", "inertia", "segments", "quality",
    "residual_threshold", "residual_limit_jm", "data_sha256", "bundle_sha256", "library_versions",
}


def fit(client, name, body, **kwargs):
    return client.post(f"/v1/segmentations/{name}/fit", json=body, **kwargs)


def post_raw(client, name, content: bytes | str, content_type="application/json", query=""):
    return client.post(f"/v1/segmentations/{name}/fit{query}", content=content,
                       headers={"content-type": content_type})


def iris_csv(iris) -> bytes:
    frame = pd.DataFrame(iris.data, columns=["a", "b", "c", "d"])
    frame.insert(0, "id", [f"r{i}" for i in range(len(frame))])
    return frame.to_csv(index=False).encode()


# --------------------------------------------------------------------------- the report
def test_fit_json_returns_the_report_per_api(client, iris):
    response = fit(client, NAME, {"records": records_from(iris, id_prefix="c"), "id_column": "id", "k": 3})
    assert response.status_code == 201, response.text
    report = response.json()
    assert REPORT_FIELDS <= set(report)
    assert (report["name"], report["version"], report["live"]) == (NAME, 1, True)
    assert report["created_at"].endswith("Z")
    assert report["features"] == list(iris.feature_names) and report["id_column"] == "id"
    assert report["config"]["k"] == 3 and report["config"]["components"] == 0.9
    assert report["selection"]["method"] == "fixed" and len(report["selection"]["curve"]) == 1
    assert len(report["segments"]) == 3
    assert sum(s["size"] for s in report["segments"]) == 150
    for segment in report["segments"]:
        assert set(segment) >= {"id", "label", "size", "share", "distance_threshold", "centroid", "profile"}
        assert set(segment["profile"][iris.feature_names[0]]) == {"mean", "median", "std", "z"}
    # API.md: numbers are plain JSON numbers, never NaN or Infinity.
    assert all(math.isfinite(v) for v in walk_numbers(report))
    # Reference: sklearn KMeans(k=3, n_init=10, random_state=0) on StandardScaler -> PCA(0.9) space.
    space = PCA(n_components=0.9, svd_solver="full").fit_transform(StandardScaler().fit_transform(iris.data))
    reference = KMeans(n_clusters=3, n_init=10, random_state=0).fit(space)
    assert report["components"] == space.shape[1]
    assert report["inertia"] == pytest.approx(reference.inertia_, rel=1e-9)
    assert sorted(s["size"] for s in report["segments"]) == sorted(np.bincount(reference.labels_).tolist())
    # The same report is served by GET .../versions/1.
    stored = client.get(f"/v1/segmentations/{NAME}/versions/1").json()
    assert stored == report


def test_fit_silhouette_subsampled_above_the_setting(tmp_path, wine):
    # Wine has 178 records; with silhouette_sample=100 the silhouette is computed on a seeded sample.
    settings = Settings(store_dir=tmp_path / "store", silhouette_sample=100)
    with TestClient(create_app(settings)) as client:
        response = fit(client, NAME, {"records": records_from(wine), "k": 3, "components": None, "seed": 5})
    assert response.status_code == 201, response.text
    report = response.json()
    space = StandardScaler().fit_transform(wine.data)
    labels = KMeans(n_clusters=3, n_init=10, random_state=5).fit(space).labels_
    # Reference: sklearn.metrics.silhouette_score with the same sample_size and random_state.
    expected = silhouette_score(space, labels, sample_size=100, random_state=5)
    assert report["quality"]["silhouette"] == pytest.approx(expected, rel=1e-9)
    assert report["quality"]["silhouette"] != pytest.approx(silhouette_score(space, labels), rel=1e-6)


def test_fit_csv_with_query_parameters(client, iris):
    query = "?k=2-6&components=none&features=a,b&id_column=id&selection=silhouette&seed=3"
    response = post_raw(client, NAME, iris_csv(iris), "text/csv", query)
    assert response.status_code == 201, response.text
    report = response.json()
    assert report["features"] == ["a", "b"]
    assert report["components"] is None and report["explained_variance_ratio"] == []
    assert report["config"]["k"] == {"min": 2, "max": 6} and report["config"]["seed"] == 3
    assert [row["k"] for row in report["selection"]["curve"]] == [2, 3, 4, 5, 6]
    # Reference: sklearn KMeans + silhouette_score on the two standardized columns; best silhouette wins.
    space = StandardScaler().fit_transform(iris.data[:, :2])
    scores = {k: silhouette_score(space, KMeans(n_clusters=k, n_init=10, random_state=3).fit(space).labels_)
              for k in range(2, 7)}
    assert report["selection"]["method"] == "silhouette"
    assert report["k"] == max(scores, key=scores.get)
    curve = {row["k"]: row["silhouette"] for row in report["selection"]["curve"]}
    assert curve == pytest.approx(scores, rel=1e-9)


def test_fit_csv_fixed_k_and_component_count(client, iris):
    response = post_raw(client, NAME, iris_csv(iris), "text/csv", "?k=3&components=2&id_column=id&make_live=false")
    assert response.status_code == 201, response.text
    report = response.json()
    assert report["k"] == 3 and report["components"] == 2 and report["features"] == ["a", "b", "c", "d"]
    # make_live=false on a first version: nothing is live.
    assert report["live"] is False
    assert client.get(f"/v1/segmentations/{NAME}").json()["live_version"] is None


def test_csv_and_json_fits_of_the_same_data_agree(client, iris):
    records = records_from(iris, feature_names=["a", "b", "c", "d"])
    from_json = fit(client, NAME, {"records": records, "k": 3}).json()
    from_csv = post_raw(client, NAME, iris_csv(iris), "text/csv", "?k=3&id_column=id").json()
    assert from_json["data_sha256"] == from_csv["data_sha256"]
    assert from_json["inertia"] == from_csv["inertia"]


def test_seeded_fit_twice_gives_identical_report_and_hashes(client, wine):
    body = {"records": records_from(wine), "k": {"min": 2, "max": 5}, "seed": 9}
    first, second = fit(client, NAME, body).json(), fit(client, NAME, body).json()
    identity = {"version", "created_at", "live"}
    assert {k: v for k, v in first.items() if k not in identity} == {
        k: v for k, v in second.items() if k not in identity}
    assert first["data_sha256"] == second["data_sha256"]
    assert first["bundle_sha256"] == second["bundle_sha256"]     # joblib dump is deterministic too
    assert (first["version"], second["version"]) == (1, 2)


# --------------------------------------------------------------------------- make_live
def test_make_live_default_first_version_live_later_ones_not(client, iris):
    body = {"records": records_from(iris), "k": 2}
    assert fit(client, NAME, body).json()["live"] is True
    second = fit(client, NAME, body).json()
    assert second["version"] == 2 and second["live"] is False
    detail = client.get(f"/v1/segmentations/{NAME}").json()
    assert detail["live_version"] == 1 and detail["latest_version"] == 2


def test_make_live_true_and_false(client, iris):
    body = {"records": records_from(iris), "k": 2}
    fit(client, NAME, body)
    assert fit(client, NAME, {**body, "make_live": True}).json()["live"] is True
    assert client.get(f"/v1/segmentations/{NAME}").json()["live_version"] == 2
    assert fit(client, NAME, {**body, "make_live": False}).json()["live"] is False
    assert client.get(f"/v1/segmentations/{NAME}").json()["live_version"] == 2
    # The report of a superseded version shows the current state.
    assert client.get(f"/v1/segmentations/{NAME}/versions/1").json()["live"] is False


def test_make_live_false_on_first_version_leaves_nothing_live(client, iris):
    report = fit(client, NAME, {"records": records_from(iris), "k": 2, "make_live": False}).json()
    assert report["live"] is False
    assert client.get("/v1/segmentations").json()["segmentations"][0]["live_version"] is None


# --------------------------------------------------------------------------- fits run off the event loop
@pytest.mark.parametrize("stage, csv", [("run_fit", False), ("parse_json", False), ("read_csv", True)])
def test_a_running_fit_does_not_block_other_requests(client, iris, monkeypatch, stage, csv):
    # Hold the fit inside one CPU-heavy stage (parsing the body, or fitting) and check that the app still
    # answers another request meanwhile: the stage runs off the event loop.
    import service.api.segmentations as route
    import service.inputs.fit_input as fit_input     # body parsing (shared with the CLI)
    import service.inputs.streamed as streamed       # CSV uploads, read in blocks from a file

    module = route if stage == "run_fit" else streamed if csv else fit_input

    started, release = threading.Event(), threading.Event()
    real = getattr(module, stage)

    def held(*args, **kwargs):
        started.set()
        release.wait(60)
        return real(*args, **kwargs)

    monkeypatch.setattr(module, stage, held)
    result: dict = {}
    if csv:
        send = lambda: post_raw(client, NAME, iris_csv(iris), "text/csv", "?k=2&id_column=id")  # noqa: E731
    else:
        send = lambda: fit(client, NAME, {"records": records_from(iris), "k": 2})  # noqa: E731
    fitter = threading.Thread(target=lambda: result.setdefault("fit", send()))
    fitter.start()
    try:
        assert started.wait(30), "the fit never reached the held stage"
        # While the fit is held, other requests are served (bounded wait).
        answers: dict = {}
        probe = threading.Thread(target=lambda: answers.setdefault("health", client.get("/healthz")))
        probe.start()
        probe.join(30)
        assert not probe.is_alive(), f"/healthz blocked behind a fit held in {stage}"
        assert answers["health"].status_code == 200
        assert fitter.is_alive()
    finally:
        release.set()
        fitter.join(60)
    assert result["fit"].status_code == 201


# --------------------------------------------------------------------------- bad input: 4xx, nothing written
def _iris_records(iris):
    return records_from(iris)


def _with(records, index, field, value):
    records = [dict(r) for r in records]
    records[index][field] = value
    return records


SEPAL = "sepal length (cm)"
PETAL_W = "petal width (cm)"


def _bad_json_cases(iris):
    """(id, request kwargs for post_raw, expected status, expected (record, field) items)."""
    good = _iris_records(iris)
    small = good[:4]

    def js(body):
        return json.dumps(body).encode()

    nan_body = js({"records": good[:10], "k": 2}).replace(b"5.4", b"NaN", 1)
    nan_row = next(i for i, r in enumerate(good[:10]) if 5.4 in r.values())
    nan_field = next(k for k, v in good[nan_row].items() if v == 5.4)
    return [
        ("unknown-feature", dict(content=js({"records": good, "features": [SEPAL, "colour"]})),
         422, [(None, "features")]),
        ("non-numeric-explicit-feature", dict(content=js({"records": _with(good, 7, PETAL_W, "wide"),
                                                          "features": [SEPAL, PETAL_W]})),
         422, [(7, PETAL_W)]),
        ("non-numeric-default-features", dict(content=js({"records": _with(good, 7, PETAL_W, "wide")})),
         422, [(7, PETAL_W)]),
        ("boolean-value", dict(content=js({"records": _with(good, 3, SEPAL, True)})), 422, [(3, SEPAL)]),
        ("all-missing-feature", dict(content=js({"records": [{**r, "spend": None} for r in good],
                                                 "features": [SEPAL, "spend"]})),
         422, [(None, "spend")]),
        # Issue 7: constant and all-missing features are handled alike: refused when named in 'features'
        # (here), dropped with a warning when the features are the default (test_new_user_mistakes.py).
        ("constant-feature", dict(content=js({"records": [{**r, "spend": 4.0} for r in good],
                                              "features": [SEPAL, "spend"]})),
         422, [(None, "spend")]),
        ("fewer-records-than-k", dict(content=js({"records": small, "k": 5})), 422, [(None, "k")]),
        ("one-record", dict(content=js({"records": good[:1], "k": 1})), 422, [(None, "records")]),
        ("no-records", dict(content=js({"records": []})), 422, [(None, "records")]),
        ("k-range-over-n-minus-1", dict(content=js({"records": small, "k": {"min": 2, "max": 4}})),
         422, [(None, "k")]),
        ("k-zero", dict(content=js({"records": small, "k": 0})), 422, [(None, "k")]),
        ("k-range-from-zero", dict(content=js({"records": small, "k": {"min": 0, "max": 2}})), 422, [(None, "k")]),
        ("components-over-features", dict(content=js({"records": good, "k": 2, "components": 5})),
         422, [(None, "components")]),
        ("components-share-not-below-1", dict(content=js({"records": good, "k": 2, "components": 1.5})),
         422, [(None, "components")]),
        ("json-nan-literal", dict(content=nan_body), 422, [(nan_row, nan_field)]),
        ("json-infinity-literal", dict(content=js({"records": good[:10], "k": 2}).replace(b"5.1", b"Infinity", 1)),
         422, [(0, SEPAL)]),
        ("json-minus-infinity-literal",
         dict(content=js({"records": good[:10], "k": 2}).replace(b"3.5", b"-Infinity", 1)),
         422, [(0, "sepal width (cm)")]),
        ("json-1e999", dict(content=js({"records": good[:10], "k": 2}).replace(b"1.4", b"1e999", 1)),
         422, [(0, "petal length (cm)")]),
        ("empty-body", dict(content=b""), 422, [(None, "body")]),
        ("whitespace-body", dict(content=b"  \n"), 422, [(None, "body")]),
        ("components-boolean", dict(content=js({"records": good, "components": True})), 422, [(None, "components")]),
        ("k-boolean", dict(content=js({"records": good, "k": True})), 422, [(None, "k")]),
        ("unknown-body-field", dict(content=js({"records": good, "colour": "red"})), 422, [(None, "colour")]),
        ("unknown-scaling", dict(content=js({"records": good, "scaling": "zscore"})), 422, [(None, "scaling")]),
        ("not-json", dict(content=b'{"records": [1, 2'), 400, []),
        ("records-not-a-list", dict(content=js({"records": {"a": 1}})), 422, [(None, "records")]),
        ("csv-bad-cell", dict(content=b"a,b,c\n1,2,3\n4,5,6\n7,x,9\n1,1,1\n", content_type="text/csv",
                              query="?k=2"),
         422, [(2, "b")]),
        ("csv-bad-cell-explicit-features", dict(content=b"a,b,c\n1,2,3\n4,5,6\n7,x,9\n1,1,1\n",
                                                content_type="text/csv", query="?k=2&features=a,b"),
         422, [(2, "b")]),
        ("csv-infinite-cell", dict(content=b"a,b\n1,2\n4,inf\n7,3\n2,2\n", content_type="text/csv", query="?k=2"),
         422, [(1, "b")]),
        ("csv-unknown-feature", dict(content=b"a,b\n1,2\n4,5\n7,3\n", content_type="text/csv",
                                     query="?features=a,z&k=2"),
         422, [(None, "features")]),
        ("csv-bad-k", dict(content=b"a,b\n1,2\n4,5\n7,3\n", content_type="text/csv", query="?k=two"),
         422, [(None, "k")]),
        ("csv-bad-components", dict(content=b"a,b\n1,2\n4,5\n7,3\n", content_type="text/csv",
                                    query="?k=2&components=lots"),
         422, [(None, "components")]),
        ("csv-unknown-query-parameter", dict(content=b"a,b\n1,2\n4,5\n7,3\n", content_type="text/csv",
                                             query="?k=2&compnents=none"),
         422, [(None, "compnents")]),
        ("csv-header-only", dict(content=b"a,b\n", content_type="text/csv", query="?k=2"), 422, [(None, "records")]),
    ]


def _case_ids():
    from sklearn.datasets import load_iris

    return [case[0] for case in _bad_json_cases(load_iris())]


def _store_files(settings) -> list[str]:
    root = Path(settings.store_dir) / "segmentations"
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


@pytest.mark.parametrize("case_id", _case_ids())
def test_bad_fit_input_gets_4xx_naming_the_field_and_writes_nothing(client, settings, iris, case_id):
    # A good first version, so "nothing written" can be checked against a known state.
    assert fit(client, NAME, {"records": records_from(iris), "k": 2}).status_code == 201
    before_files = _store_files(settings)
    before = client.get(f"/v1/segmentations/{NAME}").json()

    _, kwargs, status, expected = next(c for c in _bad_json_cases(iris) if c[0] == case_id)
    response = post_raw(client, NAME, **kwargs)
    assert response.status_code == status, response.text
    detail = response.json()["detail"]
    if expected:
        pairs = {(item["record"], item["field"].split(".")[0]) for item in detail}
        for record, field in expected:
            assert (record, field) in pairs, detail
    else:
        assert isinstance(detail, str) and detail

    after = client.get(f"/v1/segmentations/{NAME}").json()
    assert after["latest_version"] == 1 and [v["version"] for v in after["versions"]] == [1]
    assert after["updated_at"] == before["updated_at"]
    assert _store_files(settings) == before_files
    # The version counter did not move: the next good fit is version 2.
    assert fit(client, NAME, {"records": records_from(iris), "k": 2}).json()["version"] == 2


@pytest.mark.parametrize("name", ["Shop", "-shop", "_shop", "shop.v2", "a" * 64, "shöp", "shop%20x"])
def test_invalid_segmentation_name_is_422_and_nothing_is_written(client, settings, iris, name):
    # API.md: name ^[a-z0-9][a-z0-9_-]{0,62}$; a name that does not match is content the service cannot use (422).
    response = fit(client, name, {"records": records_from(iris), "k": 2})
    assert response.status_code == 422, response.text
    assert [item["field"] for item in response.json()["detail"]] == ["name"]
    assert client.get("/v1/segmentations").json() == {"segmentations": []}
    assert _store_files(settings) == []


def test_longest_valid_name_is_accepted(client, iris):
    name = "a" + "-_0" * 20 + "b9"       # 63 characters
    assert len(name) == 63
    assert fit(client, name, {"records": records_from(iris), "k": 2}).status_code == 201


def test_bad_records_list_every_bad_value_with_record_index(client, iris):
    records = _with(_with(records_from(iris), 2, SEPAL, "n/a"), 9, PETAL_W, [1])
    response = fit(client, NAME, {"records": records, "features": [SEPAL, PETAL_W]})
    assert response.status_code == 422
    items = [(i["record"], i["field"]) for i in response.json()["detail"]]
    assert items == [(2, SEPAL), (9, PETAL_W)]


def test_missing_values_are_imputed_with_training_medians(client, iris):
    records = records_from(iris)
    for i in (0, 5, 77):
        records[i][SEPAL] = None
    del records[10][PETAL_W]
    response = fit(client, NAME, {"records": records, "k": 3})
    assert response.status_code == 201, response.text
    medians = response.json()["imputation_medians"]
    # Reference: numpy.nanmedian of the observed values.
    column = np.array([np.nan if r.get(SEPAL) is None else r[SEPAL] for r in records])
    assert medians[SEPAL] == pytest.approx(np.nanmedian(column))


def test_csv_body_round_trips_through_pandas(client, iris):
    # A CSV written by pandas with an empty cell is read back with that cell missing (imputed).
    frame = pd.DataFrame(iris.data, columns=["a", "b", "c", "d"])
    frame.loc[4, "c"] = np.nan
    body = io.StringIO()
    frame.to_csv(body, index=False)
    response = post_raw(client, NAME, body.getvalue().encode(), "text/csv", "?k=3")
    assert response.status_code == 201, response.text
    assert response.json()["imputation_medians"]["c"] == pytest.approx(frame["c"].median())


def test_fit_rejects_a_k_range_with_more_candidates_than_allowed(tmp_path, iris):
    # Each candidate k is a full fit; the range size is capped by a setting (SEGSCORE_MAX_K_CANDIDATES).
    from fastapi.testclient import TestClient

    from service.app import create_app
    from service.settings import Settings

    with TestClient(create_app(Settings(store_dir=tmp_path / "store", max_k_candidates=3))) as small:
        records = records_from(iris, ["a", "b", "c", "d"])
        response = small.post("/v1/segmentations/capped/fit", json={"records": records, "k": {"min": 2, "max": 5}})
        assert response.status_code == 422
        assert response.json()["detail"][0]["field"] == "k"
        assert "at most 3" in response.json()["detail"][0]["message"]
        assert small.get("/v1/segmentations").json()["segmentations"] == []
        ok = small.post("/v1/segmentations/capped/fit", json={"records": records, "k": {"min": 2, "max": 4}})
        assert ok.status_code == 201
