"""List, read, promote/roll back, label; health, readiness and metrics; concurrent fits through the app.

Shapes and status codes are API.md's; each test checks one outcome.
"""

from __future__ import annotations

import re
import threading

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from

NAME = "shop"
ISO_UTC = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z$")


@pytest.fixture
def fitted(client, iris):
    """Three versions of 'shop' (k = 2, 3, 4); version 1 live."""
    for k in (2, 3, 4):
        response = client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": k})
        assert response.status_code == 201, response.text
    return client


def test_list_shape(fitted, iris):
    fitted.post("/v1/segmentations/another/fit", json={"records": records_from(iris), "k": 2})
    body = fitted.get("/v1/segmentations").json()
    assert set(body) == {"segmentations"}
    rows = body["segmentations"]
    assert [r["name"] for r in rows] == ["another", NAME]
    shop = rows[1]
    assert set(shop) >= {"name", "live_version", "latest_version", "created_at", "updated_at"}
    assert (shop["live_version"], shop["latest_version"]) == (1, 3)
    assert ISO_UTC.match(shop["created_at"]) and ISO_UTC.match(shop["updated_at"])


def test_list_is_empty_on_a_new_store(client):
    assert client.get("/v1/segmentations").json() == {"segmentations": []}


def test_detail_shape(fitted):
    body = fitted.get(f"/v1/segmentations/{NAME}").json()
    assert set(body) >= {"name", "live_version", "latest_version", "created_at", "updated_at", "versions"}
    assert [v["version"] for v in body["versions"]] == [1, 2, 3]
    assert [v["k"] for v in body["versions"]] == [2, 3, 4]
    assert [v["live"] for v in body["versions"]] == [True, False, False]
    for row in body["versions"]:
        assert set(row) >= {"version", "created_at", "live", "k", "n_records", "data_sha256"}
        assert row["n_records"] == 150 and re.fullmatch(r"[0-9a-f]{64}", row["data_sha256"])
        assert ISO_UTC.match(row["created_at"])


def test_version_report_matches_detail_row(fitted):
    report = fitted.get(f"/v1/segmentations/{NAME}/versions/2").json()
    assert (report["name"], report["version"], report["k"], report["live"]) == (NAME, 2, 3, False)


def test_put_live_promotes_and_rolls_back(fitted):
    promoted = fitted.put(f"/v1/segmentations/{NAME}/live", json={"version": 3})
    assert promoted.status_code == 200
    assert promoted.json()["live_version"] == 3
    assert [v["live"] for v in promoted.json()["versions"]] == [False, False, True]
    assert fitted.get(f"/v1/segmentations/{NAME}/versions/3").json()["live"] is True
    rolled_back = fitted.put(f"/v1/segmentations/{NAME}/live", json={"version": 1})
    assert rolled_back.status_code == 200 and rolled_back.json()["live_version"] == 1
    assert fitted.get(f"/v1/segmentations/{NAME}/versions/3").json()["live"] is False


@pytest.mark.parametrize("body", [{"version": 0}, {"version": "two"}, {}, {"version": 1, "extra": 1}])
def test_put_live_bad_body_is_422(fitted, body):
    response = fitted.put(f"/v1/segmentations/{NAME}/live", json=body)
    assert response.status_code == 422
    assert fitted.get(f"/v1/segmentations/{NAME}").json()["live_version"] == 1


def test_patch_label_shows_in_the_version_report(fitted):
    response = fitted.patch(f"/v1/segmentations/{NAME}/versions/2/segments/1", json={"label": "loyal regulars"})
    assert response.status_code == 200
    assert response.json()["id"] == 1 and response.json()["label"] == "loyal regulars"
    report = fitted.get(f"/v1/segmentations/{NAME}/versions/2").json()
    assert [s["label"] for s in report["segments"]] == [None, "loyal regulars", None]
    # Labels belong to one version only.
    other = fitted.get(f"/v1/segmentations/{NAME}/versions/3").json()
    assert all(s["label"] is None for s in other["segments"])
    # Relabel, then clear.
    fitted.patch(f"/v1/segmentations/{NAME}/versions/2/segments/1", json={"label": "bargain hunters"})
    assert fitted.get(f"/v1/segmentations/{NAME}/versions/2").json()["segments"][1]["label"] == "bargain hunters"
    fitted.patch(f"/v1/segmentations/{NAME}/versions/2/segments/1", json={"label": None})
    assert fitted.get(f"/v1/segmentations/{NAME}/versions/2").json()["segments"][1]["label"] is None


@pytest.mark.parametrize(
    "method, path, body",
    [
        ("get", "/v1/segmentations/nobody", None),
        ("get", "/v1/segmentations/nobody/versions/1", None),
        ("get", f"/v1/segmentations/{NAME}/versions/9", None),
        ("put", "/v1/segmentations/nobody/live", {"version": 1}),
        ("put", f"/v1/segmentations/{NAME}/live", {"version": 9}),
        ("patch", "/v1/segmentations/nobody/versions/1/segments/0", {"label": "x"}),
        ("patch", f"/v1/segmentations/{NAME}/versions/9/segments/0", {"label": "x"}),
        ("patch", f"/v1/segmentations/{NAME}/versions/1/segments/2", {"label": "x"}),   # k = 2: ids 0..1
    ],
    ids=["segmentation", "version-of-unknown", "version", "live-unknown", "live-version", "label-unknown",
         "label-version", "label-segment"],
)
def test_unknown_things_are_404(fitted, method, path, body):
    kwargs = {} if body is None else {"json": body}
    response = getattr(fitted, method)(path, **kwargs)
    assert response.status_code == 404, response.text
    assert isinstance(response.json()["detail"], str) and response.json()["detail"]


def test_a_segment_id_that_is_not_plain_digits_is_422(fitted):
    # Issue 7 item 14: only plain decimal integers are numbers in a path ("-1" was a 404 before; now the
    # shared path type refuses it, as it refuses "+1", "1.0" and " 1").
    response = fitted.patch(f"/v1/segmentations/{NAME}/versions/1/segments/-1", json={"label": "x"})
    assert response.status_code == 422, response.text
    assert response.json()["detail"][0]["field"] == "segment"


def test_versions_survive_a_restart(fitted, settings):
    fitted.put(f"/v1/segmentations/{NAME}/live", json={"version": 2})
    fitted.patch(f"/v1/segmentations/{NAME}/versions/2/segments/0", json={"label": "kept"})
    before = fitted.get(f"/v1/segmentations/{NAME}").json()
    with TestClient(create_app(settings)) as restarted:
        assert restarted.get(f"/v1/segmentations/{NAME}").json() == before
        assert restarted.get(f"/v1/segmentations/{NAME}/versions/2").json()["segments"][0]["label"] == "kept"
        next_fit = restarted.post(f"/v1/segmentations/{NAME}/fit", json={"records": fitted_records(), "k": 2})
        assert next_fit.json()["version"] == 4


def fitted_records():
    from sklearn.datasets import load_iris

    return records_from(load_iris())


# --------------------------------------------------------------------------- concurrency
def test_ten_concurrent_fits_through_the_app_get_distinct_versions(tmp_path, iris):
    settings = Settings(store_dir=tmp_path / "store", fit_concurrency=10)
    records = records_from(iris)
    barrier = threading.Barrier(10)
    results: list = [None] * 10

    with TestClient(create_app(settings)) as client:
        def one(i: int) -> None:
            barrier.wait(30)
            results[i] = client.post(f"/v1/segmentations/{NAME}/fit",
                                     json={"records": records, "k": 2 + i % 3, "seed": i, "n_init": 2})

        threads = [threading.Thread(target=one, args=(i,)) for i in range(10)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(120)
        assert not any(t.is_alive() for t in threads)
        assert [r.status_code for r in results] == [201] * 10
        assert sorted(r.json()["version"] for r in results) == list(range(1, 11))
        detail = client.get(f"/v1/segmentations/{NAME}").json()
        assert [v["version"] for v in detail["versions"]] == list(range(1, 11))
        # Exactly one first version went live by default.
        assert sum(r.json()["live"] for r in results) == 1 and detail["live_version"] == 1
        # Each version's stored report is the one its request got back.
        for r in results:
            stored = client.get(f"/v1/segmentations/{NAME}/versions/{r.json()['version']}").json()
            assert stored["bundle_sha256"] == r.json()["bundle_sha256"]
            assert stored["config"]["seed"] == r.json()["config"]["seed"]


# --------------------------------------------------------------------------- health
def test_healthz(client):
    response = client.get("/healthz")
    assert response.status_code == 200 and response.json() == {"status": "ok"}


def test_readyz_ready_with_loadable_live_bundles(fitted):
    response = fitted.get("/readyz")
    assert response.status_code == 200 and response.json()["status"] == "ready"


def test_readyz_503_when_a_live_artifact_is_corrupted(fitted, settings):
    artifact = fitted.app.state.store.artifact_path(NAME, 1)
    data = bytearray(artifact.read_bytes())
    data[len(data) // 2] ^= 0xFF
    artifact.write_bytes(bytes(data))
    # The running server holds the copy it verified when it loaded it; a server started now (a restart, or
    # another worker) must read the file and finds it corrupted.
    with TestClient(create_app(settings)) as restarted:
        response = restarted.get("/readyz")
        assert response.status_code == 503
        problems = response.json()["detail"]
        assert problems[0]["segmentation"] == NAME and problems[0]["version"] == 1
        assert "SHA-256" in problems[0]["message"]
        # Only that version: making version 2 live makes the service ready again.
        restarted.put(f"/v1/segmentations/{NAME}/live", json={"version": 2})
        assert restarted.get("/readyz").status_code == 200
        # The report (index data) of the corrupted version is still readable.
        assert restarted.get(f"/v1/segmentations/{NAME}/versions/1").status_code == 200


def test_metrics_text_exposition(fitted):
    fitted.get("/healthz")
    response = fitted.get("/metrics")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain")
    text = response.text
    # Prometheus text format (prometheus_client): counters end in _total, with HELP/TYPE lines.
    assert "# TYPE segscore_fits_total counter" in text or "# TYPE segscore_fits counter" in text
    fits = [line for line in text.splitlines() if line.startswith("segscore_fits_total")]
    assert fits and float(fits[0].split()[-1]) == 3.0
    assert re.search(r'segscore_http_requests_total\{[^}]*route="/healthz"[^}]*\} 1\.0', text)
    # Labelled by route template, not by the concrete path (no segmentation names in label values).
    assert re.search(r'segscore_http_requests_total\{[^}]*route="/v1/segmentations/\{name\}/fit"'
                     r'[^}]*status="201"[^}]*\} 3\.0', text)
    assert 'route="/v1/segmentations/shop' not in text and "/segmentations/shop" not in text
