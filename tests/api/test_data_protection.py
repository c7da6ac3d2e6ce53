"""Who did what (events, created_by), erasure of versions and segmentations, and drift-report retention."""

from __future__ import annotations

import sqlite3

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings
from service.store import FilesystemStore
from tests.conftest import records_from

NAME = "shop"
BASE = f"/v1/segmentations/{NAME}"


@pytest.fixture
def two_versions(client, iris):
    """'shop' v1 (live) and v2; a label and a drift report on each version."""
    body = {"records": records_from(iris), "k": 2}
    for _ in range(2):
        assert client.post(f"{BASE}/fit", json=body).status_code == 201
    for version in (1, 2):
        assert client.patch(f"{BASE}/versions/{version}/segments/0", json={"label": f"l{version}"}).status_code == 200
        assert client.post(f"{BASE}/drift?version={version}", json={"records": records_from(iris)}).status_code == 200
    return client


def _rows(client, table: str, name: str = NAME) -> list[tuple]:
    with sqlite3.connect(client.app.state.settings.store_dir / "index.sqlite3") as db:
        return db.execute(f"SELECT * FROM {table} WHERE name=?", (name,)).fetchall()


def _files(client, version: int | None = None) -> list[str]:
    folder = client.app.state.settings.store_dir / "segmentations" / NAME
    pattern = "*" if version is None else f"v{version:06d}.*"
    return sorted(p.name for p in folder.glob(pattern)) if folder.exists() else []


def _version_paths(client, version: int) -> list:
    """A version's report file and its two artifact objects (serving, analysts')."""
    store = client.app.state.store
    report = client.app.state.settings.store_dir / "segmentations" / NAME / f"v{version:06d}.json"
    return [report, store.artifact_path(NAME, version), store.fitted_path(NAME, version)]


def _objects(client) -> list[str]:
    return sorted(p.name for p in (client.app.state.settings.store_dir / "objects").rglob("*") if p.is_file())


# --------------------------------------------------------------------------- events
def test_events_newest_first_and_created_by(two_versions):
    client = two_versions
    assert client.put(f"{BASE}/live", json={"version": 2}).status_code == 200
    detail = client.get(BASE).json()
    actions = [(e["action"], e["version"]) for e in detail["events"]]
    assert actions == [("set_live", 2), ("label", 2), ("label", 1), ("fit", 2), ("fit", 1)]
    assert all(e["actor"] == "local" for e in detail["events"])      # auth is off in this fixture
    assert detail["events"][0]["details"] == {"previous": 1, "change": "promote"}
    assert client.put(f"{BASE}/live", json={"version": 1}).status_code == 200
    assert client.get(BASE).json()["events"][0]["details"] == {"previous": 2, "change": "roll_back"}
    assert detail["events"][1]["details"] == {"segment": 0, "label": "l2"}
    ats = [e["at"] for e in detail["events"]]
    assert ats == sorted(ats, reverse=True) and all(a.endswith("Z") and len(a) == 20 for a in ats)
    assert [v["created_by"] for v in detail["versions"]] == ["local", "local"]


def test_a_cli_fit_is_recorded_as_cli(tmp_path, iris):
    from service.cli import fit_csv_into_store
    import pandas as pd

    settings = Settings(store_dir=tmp_path / "s")
    csv = pd.DataFrame(iris.data, columns=iris.feature_names).to_csv(index=False).encode()
    fit_csv_into_store(settings, NAME, csv, {"k": 2})
    detail = FilesystemStore(settings.store_dir).get_segmentation(NAME)
    assert detail["versions"][0]["created_by"] == "cli"
    assert detail["events"][0]["actor"] == "cli"


# --------------------------------------------------------------------------- deleting a version
def test_delete_a_version_erases_it_and_what_hangs_on_it(two_versions):
    client = two_versions
    second, first = _version_paths(client, 2), _version_paths(client, 1)
    assert all(path.exists() for path in second + first)         # artifacts and report exist
    # The two fits had the same input and seed: one pair of content-addressed objects serves both versions.
    assert second[1:] == first[1:]
    # Loads v2 into the server's cache (the empty record itself is refused: too many missing values).
    assert client.post(f"{BASE}/assign?version=2", json={"records": [{}]}).status_code == 422
    response = client.delete(f"{BASE}/versions/2")
    assert response.status_code == 204 and response.content == b""
    assert client.get(f"{BASE}/versions/2").status_code == 404
    assert client.post(f"{BASE}/assign?version=2", json={"records": [{}]}).status_code == 404
    assert _files(client, 2) == [] and not second[0].exists()
    assert all(path.exists() for path in first)                  # the other version's files (shared objects too)
    assert [row[1] for row in _rows(client, "labels")] == [1]
    assert {row[3] for row in _rows(client, "drift_reports")} == {1}
    detail = client.get(BASE).json()
    assert [v["version"] for v in detail["versions"]] == [1]
    assert (detail["events"][0]["action"], detail["events"][0]["version"]) == ("delete_version", 2)
    assert detail["events"][0]["details"] == {"drift_reports": 1}


def test_the_next_fit_after_deleting_the_latest_version_gets_a_new_number(two_versions, iris):
    client = two_versions
    assert client.delete(f"{BASE}/versions/2").status_code == 204
    report = client.post(f"{BASE}/fit", json={"records": records_from(iris), "k": 2}).json()
    assert report["version"] == 3


def test_deleting_the_live_version_is_409_and_changes_nothing(two_versions):
    client = two_versions
    before = client.get(BASE).json()
    response = client.delete(f"{BASE}/versions/1")
    assert response.status_code == 409
    assert "live" in response.json()["detail"]
    assert client.get(BASE).json() == before
    assert all(path.exists() for path in _version_paths(client, 1))


@pytest.mark.parametrize("path, status", [(f"{BASE}/versions/9", 404), ("/v1/segmentations/nope/versions/1", 404),
                                          ("/v1/segmentations/nope", 404), ("/v1/segmentations/Bad!", 422)])
def test_deleting_what_does_not_exist(two_versions, path, status):
    assert two_versions.delete(path).status_code == status


# --------------------------------------------------------------------------- deleting a segmentation
def test_delete_a_segmentation_erases_everything_but_the_event(two_versions, iris):
    client = two_versions
    assert client.delete(BASE).status_code == 204
    assert client.get(BASE).status_code == 404
    assert client.get("/v1/segmentations").json() == {"segmentations": []}
    assert _files(client) == [] and _objects(client) == []
    assert not (client.app.state.settings.store_dir / "segmentations" / NAME).exists()
    for table in ("segmentations", "versions", "labels", "drift_reports"):
        assert _rows(client, table) == [], table
    events = client.app.state.store.events(NAME, limit=10)
    assert [(e["action"], e["actor"]) for e in events] == [("delete_segmentation", "local")]
    assert events[0]["details"] == {"versions": [1, 2], "drift_reports": 2}
    # A new segmentation of the same name starts at version 1; its history starts at the deletion.
    assert client.post(f"{BASE}/fit", json={"records": records_from(iris), "k": 2}).json()["version"] == 1
    detail = client.get(BASE).json()
    assert [e["action"] for e in detail["events"]] == ["fit", "delete_segmentation"]
    assert [v["created_by"] for v in detail["versions"]] == ["local"]
    assert client.get(f"{BASE}/drift").json() == {"reports": []}


# --------------------------------------------------------------------------- drift-report retention
def test_retention_deletes_old_drift_reports_at_start_up(tmp_path, iris):
    settings = Settings(store_dir=tmp_path / "s", drift_retention_days=30)
    with TestClient(create_app(settings)) as client:
        assert client.post(f"{BASE}/fit", json={"records": records_from(iris), "k": 2}).status_code == 201
        fresh = client.post(f"{BASE}/drift", json={"records": records_from(iris)}).json()
    store = FilesystemStore(settings.store_dir)
    store.save_drift_report({**fresh, "id": "old-one", "created_at": "2020-01-01T00:00:00Z"})
    assert len(store.list_drift_reports(NAME, version=None, limit=10)) == 2
    with TestClient(create_app(settings)) as client:       # start-up applies the retention
        ids = [r["id"] for r in client.get(f"{BASE}/drift").json()["reports"]]
    assert ids == [fresh["id"]]
    event = store.events(None, limit=1)[0]
    assert (event["action"], event["actor"], event["details"]["deleted"]) == ("prune_drift_reports", "server", 1)


def test_retention_zero_keeps_every_report(tmp_path, iris):
    settings = Settings(store_dir=tmp_path / "s")
    assert settings.drift_retention_days == 0
    with TestClient(create_app(settings)) as client:
        client.post(f"{BASE}/fit", json={"records": records_from(iris), "k": 2})
        fresh = client.post(f"{BASE}/drift", json={"records": records_from(iris)}).json()
    FilesystemStore(settings.store_dir).save_drift_report({**fresh, "id": "old", "created_at": "2020-01-01T00:00:00Z"})
    with TestClient(create_app(settings)) as client:
        assert len(client.get(f"{BASE}/drift").json()["reports"]) == 2
