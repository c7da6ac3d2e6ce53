"""POST and GET /v1/segmentations/{name}/drift through the HTTP app.

The statistics themselves are checked against SciPy in tests/core/test_drift.py; here: the contract
(API.md, "Drift report"), JSON and CSV bodies, detection of a few known changes end to end, bad input
(4xx naming record and field, nothing stored), version and limit filters, persistence across app
restarts and concurrent writes. Data: a seeded Gaussian mixture from scikit-learn's ``make_blobs``
(an outside generator) with fixed centres; batches are fresh draws from the same model.
"""

from __future__ import annotations

import json
import math
import re
import threading

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from sklearn.datasets import make_blobs

from schemas import DriftReport
from service.app import create_app
from service.settings import Settings
from service.store import FilesystemStore
from tests.conftest import walk_numbers

NAME = "shoppers"
FEATURES = ["spend", "visits", "basket", "tenure"]
CENTERS = np.array([[0.0, 0.0, 0.0, 0.0], [6.0, 1.0, -4.0, 3.0], [-3.0, 7.0, 4.0, -5.0]])
BLOB_STD = 1.2
CONTRACT_FIELDS = {"id", "name", "version", "created_at", "n_records", "status", "features", "segments",
                   "outliers", "residual"}
FEATURE_FIELDS = {"name", "psi", "ks_statistic", "p_value", "q_value", "mean_shift_sd", "missing_share", "status"}


def draw(n: int, seed: int, weights=(1 / 3, 1 / 3, 1 / 3)) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x, _ = make_blobs(n_samples=rng.multinomial(n, weights), centers=CENTERS, cluster_std=BLOB_STD,
                      random_state=seed)
    return x


def records(x: np.ndarray) -> list[dict]:
    """Rows -> JSON records; NaN becomes null (a missing value)."""
    return [{f: (None if math.isnan(v) else float(v)) for f, v in zip(FEATURES, row)} for row in x.tolist()]


def fit(client, name=NAME, seed=1, **params):
    body = {"records": records(draw(3000, seed)), "k": 3, "components": 2, **params}
    response = client.post(f"/v1/segmentations/{name}/fit", json=body)
    assert response.status_code == 201, response.text
    return response.json()


def drift(client, x, name=NAME, query=""):
    return client.post(f"/v1/segmentations/{name}/drift{query}", json={"records": records(x)})


def stored(client, name=NAME, query=""):
    response = client.get(f"/v1/segmentations/{name}/drift{query}")
    assert response.status_code == 200, response.text
    return response.json()["reports"]


@pytest.fixture
def settings(tmp_path) -> Settings:
    # For conftest's ``client``. No test here reads the fit's silhouette: 500 sampled rows of it, not all 3,000.
    return Settings(store_dir=tmp_path / "store", silhouette_sample=500)


@pytest.fixture
def fitted(client):
    fit(client)
    return client


@pytest.fixture(scope="module")
def training_std() -> np.ndarray:
    # Population std of a fresh 3,000-row draw (the fit's training set is the same draw with seed 1).
    return draw(3000, 1).std(axis=0)


# --------------------------------------------------------------------------- the report
def test_post_drift_returns_the_contract_report_and_stores_it(fitted):
    response = drift(fitted, draw(1000, seed=100))
    assert response.status_code == 200, response.text
    report = response.json()
    assert CONTRACT_FIELDS <= set(report)
    assert re.fullmatch(r"[0-9a-f]{32}", report["id"])
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", report["created_at"])
    assert (report["name"], report["version"], report["n_records"]) == (NAME, 1, 1000)
    assert [f["name"] for f in report["features"]] == FEATURES
    for row in report["features"]:
        assert FEATURE_FIELDS <= set(row) and {"expected", "observed"} <= set(row["missing_share"])
    assert {"expected_share", "observed_share", "psi", "chi2", "p_value", "status"} <= set(report["segments"])
    assert {"expected_rate", "observed_rate", "p_value", "status"} <= set(report["outliers"])
    assert {"expected_median", "observed_median", "p_value", "status"} <= set(report["residual"])
    # A batch from the training distribution: nothing material moved.
    assert report["status"] == "stable"
    # API.md: plain JSON numbers, never NaN or Infinity; the schema refuses both.
    assert all(math.isfinite(v) for v in walk_numbers(report))
    DriftReport.model_validate(report)
    assert stored(fitted) == [report]


def test_post_drift_accepts_csv(fitted):
    x = draw(400, seed=101)
    csv = pd.DataFrame(x, columns=FEATURES).to_csv(index=False)
    from_csv = fitted.post(f"/v1/segmentations/{NAME}/drift", content=csv, headers={"content-type": "text/csv"})
    from_json = drift(fitted, x)
    assert from_csv.status_code == 200, from_csv.text
    # Same rows, same statistics, whichever the body format (CSV text may round the last digit).
    a, b = from_csv.json(), from_json.json()
    assert a["n_records"] == b["n_records"] == 400
    for fa, fb in zip(a["features"], b["features"]):
        assert fa["status"] == fb["status"]
        for key in ("psi", "ks_statistic", "p_value", "q_value", "mean_shift_sd"):
            assert fa[key] == pytest.approx(fb[key], rel=1e-9)
    assert a["segments"]["observed_share"] == b["segments"]["observed_share"]
    assert len(stored(fitted)) == 2


def test_shifted_feature_is_reported(fitted, training_std):
    x = draw(2000, seed=102)
    x[:, 1] += 0.5 * training_std[1]  # half a training SD on "visits"
    report = drift(fitted, x).json()
    statuses = [f["status"] for f in report["features"]]
    assert statuses[1] in ("watch", "alert") and report["features"][1]["reasons"] == ["distribution"]
    assert statuses[0] == statuses[2] == statuses[3] == "stable"
    assert report["features"][1]["mean_shift_sd"] == pytest.approx(0.5, abs=0.1)


@pytest.mark.parametrize("how", ["null", "absent"])
def test_feature_filled_with_missing_values_alerts(fitted, how):
    rows = records(draw(500, seed=103))
    for row in rows:
        if how == "null":
            row["basket"] = None
        else:
            del row["basket"]
    report = fitted.post(f"/v1/segmentations/{NAME}/drift", json={"records": rows}).json()
    basket = report["features"][2]
    assert basket["status"] == "alert" and basket["reasons"] == ["missing_share"]
    assert (basket["missing_share"]["expected"], basket["missing_share"]["observed"]) == (0.0, 1.0)
    assert basket["mean_shift_sd"] is None and basket["p_value"] == 1.0
    assert report["status"] == "alert"
    assert all(math.isfinite(v) for v in walk_numbers(report))


def test_doubled_segment_share_alerts(fitted):
    report = drift(fitted, draw(2000, seed=104, weights=(2 / 3, 1 / 6, 1 / 6))).json()
    assert report["segments"]["status"] == "alert"
    assert report["status"] == "alert"


def test_segment_block_lists_each_segment_with_its_label(fitted):
    # Issue 7 (item 16) / issue 8: one item per segment with id, the store's label, shares and its own test;
    # the v1 arrays stay. Reference for the shares: numpy.bincount of the segments the assign route gives.
    patched = fitted.patch(f"/v1/segmentations/{NAME}/versions/1/segments/2", json={"label": "night owls"})
    assert patched.status_code == 200, patched.text
    x = draw(1000, seed=105)
    report = drift(fitted, x).json()
    segments = report["segments"]
    items = segments["by_segment"]
    assert [item["id"] for item in items] == [0, 1, 2]
    assert [item["label"] for item in items] == [None, None, "night owls"]
    assigned = fitted.post(f"/v1/segmentations/{NAME}/assign", json={"records": records(x)}).json()["results"]
    counts = np.bincount([r["segment"] for r in assigned], minlength=3)
    assert [item["observed_count"] for item in items] == counts.tolist()
    assert [item["observed_share"] for item in items] == pytest.approx((counts / 1000).tolist())
    assert [item["expected_share"] for item in items] == pytest.approx(segments["expected_share"])
    assert [item["observed_share"] for item in items] == pytest.approx(segments["observed_share"])
    version = fitted.get(f"/v1/segmentations/{NAME}/versions/1").json()
    # One truth for sizes: the fit report's shares are the drift baseline's.
    assert [s["share"] for s in version["segments"]] == pytest.approx(segments["expected_share"])
    assert {"cohens_h", "p_value", "q_value", "status"} <= set(items[0])


# --------------------------------------------------------------------------- bad input: 4xx, nothing stored
def test_batch_under_the_minimum_is_422_and_not_stored(fitted):
    response = drift(fitted, draw(49, seed=105))
    assert response.status_code == 422
    [item] = response.json()["detail"]
    assert item["field"] == "records" and "at least 50" in item["message"]
    assert stored(fitted) == []


def test_minimum_batch_size_is_configurable(tmp_path):
    with TestClient(create_app(Settings(store_dir=tmp_path / "s", drift_min_rows=10))) as client:
        fit(client)
        assert drift(client, draw(20, seed=106)).status_code == 200
        assert drift(client, draw(9, seed=106)).status_code == 422


def test_bad_value_is_422_naming_record_and_field(fitted):
    rows = records(draw(200, seed=107))
    rows[7]["visits"] = "many"
    response = fitted.post(f"/v1/segmentations/{NAME}/drift", json={"records": rows})
    assert response.status_code == 422
    assert response.json()["detail"] == [{"record": 7, "field": "visits", "message": "expected a number, got a string"}]
    assert stored(fitted) == []


def test_non_finite_value_is_422(fitted):
    # NaN is not JSON, but Python's encoder writes it; the service must refuse it by record and field.
    rows = records(draw(100, seed=108))
    rows[3]["tenure"] = float("nan")
    body = json.dumps({"records": rows})  # the standard encoder writes the bare token NaN
    assert "NaN" in body
    response = fitted.post(f"/v1/segmentations/{NAME}/drift", content=body, headers={"content-type": "application/json"})
    assert response.status_code == 422
    [item] = response.json()["detail"]
    assert (item["record"], item["field"]) == (3, "tenure") and "finite" in item["message"]
    assert stored(fitted) == []


def test_csv_with_a_bad_cell_or_absent_column_is_422(fitted):
    frame = pd.DataFrame(draw(100, seed=109), columns=FEATURES)
    frame["spend"] = frame["spend"].astype(object)
    frame.loc[12, "spend"] = "n/a"
    response = fitted.post(f"/v1/segmentations/{NAME}/drift", content=frame.to_csv(index=False),
                           headers={"content-type": "text/csv"})
    assert response.status_code == 422
    assert response.json()["detail"][0]["record"] == 12 and response.json()["detail"][0]["field"] == "spend"
    no_tenure = pd.DataFrame(draw(100, seed=109), columns=FEATURES).drop(columns="tenure").to_csv(index=False)
    response = fitted.post(f"/v1/segmentations/{NAME}/drift", content=no_tenure, headers={"content-type": "text/csv"})
    assert response.status_code == 422 and response.json()["detail"][0]["field"] == "tenure"
    assert stored(fitted) == []


def test_body_that_is_not_json_is_400(fitted):
    response = fitted.post(f"/v1/segmentations/{NAME}/drift", content=b"{records: [",
                           headers={"content-type": "application/json"})
    assert response.status_code == 400 and "JSON" in response.json()["detail"]
    assert stored(fitted) == []


def test_skip_leaves_bad_records_out_and_lists_them(fitted):
    rows = records(draw(120, seed=110))
    rows[4]["spend"] = True
    rows[90]["basket"] = "x"
    response = fitted.post(f"/v1/segmentations/{NAME}/drift?on_error=skip", json={"records": rows})
    assert response.status_code == 200, response.text
    report = response.json()
    assert report["n_records"] == 118 and report["skipped_records"] == 2
    assert [(e["record"], e["field"]) for e in report["errors"]] == [(4, "spend"), (90, "basket")]
    # Skipping that leaves too few usable records is still a 422.
    few = records(draw(52, seed=111))
    for row in few[:5]:
        row["visits"] = "?"
    response = fitted.post(f"/v1/segmentations/{NAME}/drift?on_error=skip", json={"records": few})
    assert response.status_code == 422 and "47 usable records" in response.json()["detail"][0]["message"]
    assert len(stored(fitted)) == 1


def test_unknown_segmentation_or_version_is_404(fitted):
    assert drift(fitted, draw(60, seed=112), name="nobody").status_code == 404
    assert fitted.get("/v1/segmentations/nobody/drift").status_code == 404
    assert drift(fitted, draw(60, seed=112), query="?version=7").status_code == 404
    assert fitted.get(f"/v1/segmentations/{NAME}/drift?version=7").status_code == 404
    assert fitted.post("/v1/segmentations/Bad Name/drift", json={"records": []}).status_code == 422
    assert stored(fitted) == []


def test_no_live_version_is_409(client):
    fit(client, make_live=False)
    assert drift(client, draw(60, seed=113)).status_code == 409
    assert drift(client, draw(60, seed=113), query="?version=1").status_code == 200


def test_drift_scope_is_required(tmp_path):
    store = FilesystemStore(tmp_path / "s")
    fit_key, assign_key, drift_key = (store.create_key(name, scopes) for name, scopes in
                                      (("f", ["fit"]), ("a", ["assign", "read"]), ("d", ["drift"])))
    with TestClient(create_app(Settings(store_dir=tmp_path / "s"))) as client:
        body = {"records": records(draw(3000, 1)), "k": 3, "components": 2}
        assert client.post(f"/v1/segmentations/{NAME}/fit", json=body,
                           headers={"authorization": "Bearer " + fit_key}).status_code == 201
        batch = {"records": records(draw(60, seed=114))}
        url = f"/v1/segmentations/{NAME}/drift"
        assert client.post(url, json=batch).status_code == 401
        assert client.post(url, json=batch, headers={"authorization": "Bearer " + assign_key}).status_code == 403
        assert client.get(url, headers={"authorization": "Bearer " + assign_key}).status_code == 403
        assert client.post(url, json=batch, headers={"authorization": "Bearer " + drift_key}).status_code == 200
        assert len(client.get(url, headers={"authorization": "Bearer " + drift_key}).json()["reports"]) == 1


# --------------------------------------------------------------------------- listing, versions, persistence
def test_list_is_newest_first_with_limit(fitted):
    ids = [drift(fitted, draw(60, seed=120 + i)).json()["id"] for i in range(22)]
    assert [r["id"] for r in stored(fitted)] == ids[::-1][:20]  # default limit 20
    assert [r["id"] for r in stored(fitted, query="?limit=2")] == [ids[-1], ids[-2]]
    assert len(stored(fitted, query="?limit=500")) == 22
    for bad in ("0", "501", "x"):
        response = fitted.get(f"/v1/segmentations/{NAME}/drift?limit={bad}")
        assert response.status_code == 422 and response.json()["detail"][0]["field"] == "limit"


def test_version_query_selects_and_filters(fitted):
    fit(fitted, seed=2)  # version 2, not live
    on_live = drift(fitted, draw(80, seed=130)).json()
    on_v2 = drift(fitted, draw(80, seed=131), query="?version=2").json()
    assert (on_live["version"], on_v2["version"]) == (1, 2)
    assert [r["id"] for r in stored(fitted, query="?version=2")] == [on_v2["id"]]
    assert [r["id"] for r in stored(fitted, query="?version=1")] == [on_live["id"]]
    assert [r["id"] for r in stored(fitted)] == [on_v2["id"], on_live["id"]]


def test_reports_survive_a_restart(settings):
    with TestClient(create_app(settings)) as first:
        fit(first)
        posted = [drift(first, draw(70, seed=140 + i)).json() for i in range(2)]
    with TestClient(create_app(settings)) as second:  # a new process-like app on the same store directory
        assert stored(second) == posted[::-1]


def test_concurrent_drift_posts_are_all_stored(settings):
    batches = [draw(3000, seed=150 + i) for i in range(4)]
    with TestClient(create_app(settings)) as one, TestClient(create_app(settings)) as two:
        fit(one)
        barrier = threading.Barrier(4)
        results: list = [None] * 4

        def post(i, client):
            barrier.wait()
            results[i] = drift(client, batches[i])

        threads = [threading.Thread(target=post, args=(i, (one, two)[i % 2])) for i in range(4)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        assert [r.status_code for r in results] == [200] * 4
        assert {r["id"] for r in stored(one)} == {r.json()["id"] for r in results}


def test_metrics_count_reports_by_status(fitted):
    drift(fitted, draw(100, seed=160))
    x = draw(500, seed=161)
    x[:, 0] = np.nan
    drift(fitted, x)
    text = fitted.get("/metrics").text
    assert 'segscore_drift_reports_total{status="stable"} 1.0' in text
    assert 'segscore_drift_reports_total{status="alert"} 1.0' in text
