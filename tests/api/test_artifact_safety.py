"""Nothing executable is loaded to serve: a planted pickle (SHA-256 updated in the index) never runs through
any route, and a tampered or missing artifact breaks its version alone.

The payload is a real pickle whose only effect is to create a marker file (the control in
``tests/store/test_artifacts.py`` shows that it does so when unpickled).
"""

from __future__ import annotations


import pytest

from tests.conftest import records_from
from tests.store.test_artifacts import plant, planted_pickle

NAME = "shop"


@pytest.fixture
def two_versions(client, iris):
    for k in (2, 3):
        response = client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": k})
        assert response.status_code == 201, response.text
    # k = 4: bytes of its own (the same bundle fitted twice is one content-addressed file).
    client.post("/v1/segmentations/other/fit", json={"records": records_from(iris), "k": 4})
    return client


def every_route(client, iris) -> dict[str, int]:
    """Call every route that can touch version 1 of 'shop'; status by route."""
    rows = records_from(iris)
    calls = {
        "readyz": lambda: client.get("/readyz"),
        "healthz": lambda: client.get("/healthz"),
        "metrics": lambda: client.get("/metrics"),
        "list": lambda: client.get("/v1/segmentations"),
        "detail": lambda: client.get(f"/v1/segmentations/{NAME}"),
        "report": lambda: client.get(f"/v1/segmentations/{NAME}/versions/1"),
        "assign-live": lambda: client.post(f"/v1/segmentations/{NAME}/assign", json={"records": rows[:3]}),
        "assign-v1": lambda: client.post(f"/v1/segmentations/{NAME}/assign?version=1", json={"records": rows[:3]}),
        "drift-v1": lambda: client.post(f"/v1/segmentations/{NAME}/drift?version=1", json={"records": rows}),
        "drift-list": lambda: client.get(f"/v1/segmentations/{NAME}/drift"),
        "label": lambda: client.patch(f"/v1/segmentations/{NAME}/versions/1/segments/0", json={"label": "x"}),
    }
    return {route: call().status_code for route, call in calls.items()}


def test_a_planted_pickle_is_never_executed_by_any_route(two_versions, iris, tmp_path):
    store = two_versions.app.state.store
    store._cache.clear()                                   # as after a restart: nothing loaded yet
    marker = tmp_path / "marker"
    plant(store, NAME, 1, planted_pickle(marker))

    statuses = every_route(two_versions, iris)
    assert not marker.exists()
    # Version 1 (live) answers an error naming it; everything that does not load it works.
    for route in ("assign-live", "assign-v1", "drift-v1"):
        assert statuses[route] == 500, statuses
    for route in ("healthz", "metrics", "list", "detail", "report", "drift-list", "label"):
        assert statuses[route] == 200, statuses
    ready = two_versions.get("/readyz")
    assert ready.status_code == 503
    assert ready.json()["detail"] == [{"segmentation": NAME, "version": 1, "message": ready.json()["detail"][0]
                                       ["message"]}]
    assert "'shop' version 1 cannot be read" in ready.json()["detail"][0]["message"]
    detail = two_versions.post(f"/v1/segmentations/{NAME}/assign?version=1",
                               json={"records": records_from(iris)[:1]}).json()["detail"]
    assert "'shop' version 1" in detail and "Traceback" not in detail
    # Other versions and segmentations keep serving.
    assert two_versions.post(f"/v1/segmentations/{NAME}/assign?version=2",
                             json={"records": records_from(iris)[:3]}).status_code == 200
    assert two_versions.post("/v1/segmentations/other/assign", json={"records": records_from(iris)[:3]}).status_code == 200
    assert not marker.exists()


@pytest.mark.parametrize("damage", ["flip-a-byte", "delete"])
def test_a_tampered_or_missing_artifact_fails_that_version_only(two_versions, iris, settings, damage):
    store = two_versions.app.state.store
    store._cache.clear()
    artifact = store.artifact_path(NAME, 1)
    if damage == "delete":
        artifact.unlink()
    else:
        data = bytearray(artifact.read_bytes())
        data[len(data) // 2] ^= 0x01
        artifact.write_bytes(bytes(data))
    rows = records_from(iris)[:3]
    failed = two_versions.post(f"/v1/segmentations/{NAME}/assign?version=1", json={"records": rows})
    assert failed.status_code == 500 and "'shop' version 1" in failed.json()["detail"]
    assert ("missing" if damage == "delete" else "SHA-256") in failed.json()["detail"]
    assert two_versions.post(f"/v1/segmentations/{NAME}/assign?version=2", json={"records": rows}).status_code == 200
    ready = two_versions.get("/readyz").json()
    assert [(p["segmentation"], p["version"]) for p in ready["detail"]] == [(NAME, 1)]
