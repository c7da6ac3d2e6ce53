"""GET /v1/segmentations/{name}/versions/{v}/compare/{w}: the crosswalk of two versions over HTTP."""

from __future__ import annotations

import joblib
import numpy as np
import pytest
from fastapi.testclient import TestClient
from sklearn.metrics import adjusted_rand_score, pairwise_distances_argmin
from sklearn.metrics.cluster import contingency_matrix

from service.app import create_app
from service.settings import Settings
from tests.conftest import create_keys, records_from

NAME = "wines"


def _fit(client, records, **params):
    response = client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records, **params})
    assert response.status_code == 201, response.text
    return response.json()


def _compare(client, v, w, **query):
    return client.get(f"/v1/segmentations/{NAME}/versions/{v}/compare/{w}", params=query)


def test_a_version_compared_with_itself_is_diagonal_with_ari_one(client, wine):
    _fit(client, records_from(wine), k=3)
    client.patch(f"/v1/segmentations/{NAME}/versions/1/segments/2", json={"label": "heavy reds"})
    response = _compare(client, 1, 1)
    assert response.status_code == 200, response.text
    body = response.json()
    assert (body["from_version"], body["to_version"], body["sample_version"]) == (1, 1, 1)
    assert body["n_records"] == 178 and body["adjusted_rand_index"] == 1.0
    table = np.array(body["contingency"])
    assert table.shape == (3, 3) and table.sum() == 178
    assert np.count_nonzero(table - np.diag(np.diag(table))) == 0
    assert [(s["id"], s["best_match"], s["share"]) for s in body["from_segments"]] == [(0, 0, 1.0), (1, 1, 1.0),
                                                                                        (2, 2, 1.0)]
    assert body["suggestions"] == [{"segment": 2, "label": "heavy reds", "from_segment": 2, "from_share": 1.0,
                                    "to_share": 1.0, "current_label": "heavy reds"}]


def test_a_refit_with_renumbered_segments_carries_labels_to_the_new_ids(client, wine):
    # k-means with one initialisation: seed 0 and seed 2 find the same three Wine groups (up to a row or two)
    # but number them differently. The renumbering is read from the fit reports' centroids, not from the route.
    first = _fit(client, records_from(wine), k=3, n_init=1, seed=0)
    second = _fit(client, records_from(wine), k=3, n_init=1, seed=2)
    features = first["features"]
    centroids_1 = np.array([[s["centroid"][f] for f in features] for s in first["segments"]])
    centroids_2 = np.array([[s["centroid"][f] for f in features] for s in second["segments"]])
    spread = wine.data.std(axis=0)             # compare centroids in standard deviations of each feature
    renumbering = pairwise_distances_argmin(centroids_1 / spread, centroids_2 / spread)
    assert sorted(renumbering.tolist()) == [0, 1, 2]
    assert renumbering.tolist() != [0, 1, 2], "precondition: the refit must number its segments differently"
    labels = {0: "light whites", 1: "young reds", 2: "aged reds"}
    for segment, label in labels.items():
        client.patch(f"/v1/segmentations/{NAME}/versions/1/segments/{segment}", json={"label": label})

    body = _compare(client, 1, 2).json()
    assert body["sample_version"] == 2
    assert body["adjusted_rand_index"] > 0.9
    carried = {s["segment"]: (s["label"], s["from_segment"]) for s in body["suggestions"]}
    assert carried == {int(renumbering[i]): (label, i) for i, label in labels.items()}
    assert all(s["from_share"] >= 0.6 and s["to_share"] >= 0.6 and s["current_label"] is None
               for s in body["suggestions"])
    # The other way round, nothing is labelled in version 2 yet: matches but no suggestions.
    back = _compare(client, 2, 1).json()
    assert back["suggestions"] == [] and back["sample_version"] == 2
    assert [s["best_match"] for s in back["to_segments"]] == renumbering.tolist()


def test_table_and_ari_match_scikit_learn_on_the_stored_objects(client, wine):
    # Outside check: both versions' assignments are recomputed here with the stored scikit-learn objects
    # (SimpleImputer, StandardScaler/RobustScaler, PCA, then sklearn.metrics.pairwise_distances_argmin to the
    # centroids), and compared with sklearn.metrics.cluster.contingency_matrix and adjusted_rand_score.
    records = records_from(wine)
    for i in range(0, 178, 9):
        records[i]["magnesium"] = None        # missing values: each version imputes its own medians
    _fit(client, records, k=3)
    _fit(client, records, k=4, method="agglomerative", linkage="ward", scaling="robust", components=None)
    body = _compare(client, 1, 2).json()

    # The server serves a pickle-free artifact; the fitted scikit-learn objects are the analysts' copy the
    # store keeps beside it (FilesystemStore.fitted_path).
    older, newer = (joblib.load(client.app.state.store.fitted_path(NAME, version)) for version in (1, 2))
    sample = newer.reference.sample
    assert np.isnan(sample).any()

    def labels(bundle):
        return pairwise_distances_argmin(bundle.project(bundle.scaled(sample)), bundle.centroids)

    first, second = labels(older), labels(newer)
    expected = contingency_matrix(first, second)
    assert expected.shape == (3, 4)            # every segment holds sample rows, so the shapes agree
    assert body["contingency"] == expected.tolist()
    assert body["adjusted_rand_index"] == pytest.approx(adjusted_rand_score(first, second), abs=1e-12)
    assert 0 < body["adjusted_rand_index"] < 1
    for row in body["from_segments"]:
        i = row["id"]
        assert row["size"] == expected[i].sum()
        assert row["best_match"] == int(np.argmax(expected[i]))
        assert row["share"] == pytest.approx(expected[i].max() / expected[i].sum())
    for row in body["to_segments"]:
        j = row["id"]
        assert row["share"] == pytest.approx(expected[:, j].max() / expected[:, j].sum())


def test_the_sample_is_the_newer_versions(client, iris):
    _fit(client, records_from(iris)[:100], k=2)
    _fit(client, records_from(iris), k=3)
    assert _compare(client, 1, 2).json()["n_records"] == 150
    assert _compare(client, 2, 1).json()["n_records"] == 150
    assert _compare(client, 1, 1).json()["n_records"] == 100


def test_versions_with_different_features_are_a_422_naming_them(client, iris):
    _fit(client, records_from(iris), k=2)
    _fit(client, records_from(iris), k=2, features=["sepal length (cm)", "petal width (cm)"])
    response = _compare(client, 1, 2)
    assert response.status_code == 422
    (item,) = response.json()["detail"]
    assert item["field"] == "features"
    assert "sepal width (cm)" in item["message"] and "petal length (cm)" in item["message"]


def test_the_same_features_in_another_order_compare(client, iris):
    _fit(client, records_from(iris), k=3)
    _fit(client, records_from(iris), k=3, features=list(reversed(iris.feature_names)))
    body = _compare(client, 1, 2).json()
    assert body["features"] == list(reversed(iris.feature_names))
    assert body["adjusted_rand_index"] > 0.9


@pytest.mark.parametrize("path, detail", [
    ("/v1/segmentations/wines/versions/1/compare/7", "segmentation 'wines' has no version 7"),
    ("/v1/segmentations/wines/versions/7/compare/1", "segmentation 'wines' has no version 7"),
    ("/v1/segmentations/nobody/versions/1/compare/1", "segmentation 'nobody' does not exist"),
], ids=["unknown-w", "unknown-v", "unknown-segmentation"])
def test_unknown_version_or_segmentation_is_404(client, wine, path, detail):
    _fit(client, records_from(wine), k=2)
    response = client.get(path)
    assert response.status_code == 404
    assert response.json()["detail"] == detail


@pytest.mark.parametrize("min_share", ["0.5", "1.5", "x"])
def test_min_share_outside_its_range_is_422(client, wine, min_share):
    _fit(client, records_from(wine), k=2)
    response = _compare(client, 1, 1, min_share=min_share)
    assert response.status_code == 422
    assert response.json()["detail"][0]["field"] == "min_share"


def test_compare_needs_the_read_scope(tmp_path, iris):
    keys = create_keys(tmp_path / "store", {"fit": ["fit"], "read": ["read"], "assign": ["assign"]})
    fit_key, read_key, assign_key = keys["fit"], keys["read"], keys["assign"]
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as secured:
        secured.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": 2},
                     headers={"Authorization": f"Bearer {fit_key}"})
        path = f"/v1/segmentations/{NAME}/versions/1/compare/1"
        assert secured.get(path).status_code == 401
        assert secured.get(path, headers={"Authorization": f"Bearer {assign_key}"}).status_code == 403
        assert secured.get(path, headers={"Authorization": f"Bearer {read_key}"}).status_code == 200


def test_the_route_is_in_the_openapi_description(client):
    schema = client.get("/openapi.json").json()
    operation = schema["paths"]["/v1/segmentations/{name}/versions/{v}/compare/{w}"]["get"]
    assert operation["responses"]["200"]["content"]["application/json"]["schema"]["$ref"].endswith(
        "/VersionComparison")
    assert {p["name"] for p in operation["parameters"]} == {"name", "v", "w", "min_share"}
