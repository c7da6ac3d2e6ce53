"""API keys and scopes (API.md: 401 no or unknown key, 403 key lacks the scope; 'Authorization: Bearer <key>').

The authorization matrix is built from the app's own route table: every /v1 route must declare a scope
(``require_scope``) and have an example request below, so a new route fails these tests until it does both.
"""

from __future__ import annotations

import json
import logging
import shutil
import sqlite3
import tempfile
import time
from pathlib import Path

import pytest
from click.testing import CliRunner
from fastapi.routing import APIRoute, iter_route_contexts
from fastapi.testclient import TestClient

from service.app import create_app
from service.auth import KEYS_VISIBLE_WITHIN
from service.cli import main
from service.settings import SCOPES, Settings
from service.store import FilesystemStore
from service.store.keys import SHOWN_PREFIX, new_key
from tests.conftest import records_from

NAME = "shop"


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


@pytest.fixture(scope="module")
def template(tmp_path_factory, iris):
    """A store with 'shop' v1 (live) and v2, one drift report, and one key per scope (built once)."""
    root = tmp_path_factory.mktemp("auth") / "store"
    with TestClient(create_app(Settings(store_dir=root))) as client:   # no key yet: open on loopback
        body = {"records": records_from(iris), "k": 2}
        assert client.post(f"/v1/segmentations/{NAME}/fit", json=body).status_code == 201
        assert client.post(f"/v1/segmentations/{NAME}/fit", json=body).status_code == 201
        assert client.post(f"/v1/segmentations/{NAME}/drift", json={"records": records_from(iris)}).status_code == 200
        # A finished background job for the job routes' rows of the matrix: cancelled while it waits for a fit
        # slot (so no third version).
        job = _cancelled_job(client, body)
    store = FilesystemStore(root)
    assert store.job(job["id"])["state"] == "cancelled"
    keys = {scope: store.create_key(f"key-{scope}", [scope]) for scope in SCOPES}
    return root, keys, job["id"]


def _cancelled_job(client, body) -> dict:
    """Start a background fit and cancel it before it runs: the fit slot is held by the test meanwhile."""
    limiter = client.app.state.fit_limiter
    holder = object()
    client.portal.call(limiter.acquire_on_behalf_of, holder)
    try:
        job = client.post(f"/v1/segmentations/{NAME}/fit?background=true", json=body).json()
        assert client.delete(f"/v1/jobs/{job['id']}").json()["state"] == "cancelled"
    finally:
        client.portal.call(lambda: limiter.release_on_behalf_of(holder))
    return job


@pytest.fixture
def secured(template, tmp_path):
    """A fresh copy of the template store behind a running app, and the keys (by scope)."""
    root, keys, job_id = template
    shutil.copytree(root, tmp_path / "store")
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as client:
        yield client, keys, job_id


# (method, route template) -> (path, JSON body, the route's normal status with a sufficient key)
def _examples(iris, job_id: str = "0" * 32) -> dict[tuple[str, str], tuple[str, object, int]]:
    base = f"/v1/segmentations/{NAME}"
    return {
        ("GET", "/v1/jobs"): (f"/v1/jobs?segmentation={NAME}", None, 200),
        ("GET", "/v1/jobs/{job_id}"): (f"/v1/jobs/{job_id}", None, 200),
        ("GET", "/v1/jobs/{job_id}/report"): (f"/v1/jobs/{job_id}/report", None, 409),    # cancelled: no report
        # The template's job has finished: the normal answer of a sufficient key is the 409 of a finished job.
        ("DELETE", "/v1/jobs/{job_id}"): (f"/v1/jobs/{job_id}", None, 409),
        ("POST", "/v1/segmentations/{name}/fit"): (f"{base}/fit", {"records": records_from(iris), "k": 2}, 201),
        ("GET", "/v1/segmentations"): ("/v1/segmentations", None, 200),
        ("GET", "/v1/segmentations/{name}"): (base, None, 200),
        ("GET", "/v1/segmentations/{name}/versions/{version}"): (f"{base}/versions/1", None, 200),
        ("PUT", "/v1/segmentations/{name}/live"): (f"{base}/live", {"version": 2}, 200),
        ("PATCH", "/v1/segmentations/{name}/versions/{version}/segments/{segment}"):
            (f"{base}/versions/1/segments/0", {"label": "steady"}, 200),
        ("DELETE", "/v1/segmentations/{name}/versions/{version}"): (f"{base}/versions/2", None, 204),
        ("DELETE", "/v1/segmentations/{name}"): (base, None, 204),
        ("POST", "/v1/segmentations/{name}/assign"): (f"{base}/assign", {"records": records_from(iris)[:3]}, 200),
        ("POST", "/v1/segmentations/{name}/drift"): (f"{base}/drift", {"records": records_from(iris)}, 200),
        ("GET", "/v1/segmentations/{name}/drift"): (f"{base}/drift", None, 200),
        # The template store's live window holds fewer records than a report needs: the route's own 422.
        ("GET", "/v1/segmentations/{name}/drift/live"): (f"{base}/drift/live", None, 422),
        ("GET", "/v1/segmentations/{name}/versions/{v}/compare/{w}"): (f"{base}/versions/1/compare/2", None, 200),
        # The chart routes also take the console's session cookie (ChartReadScope); here the Bearer header.
        ("GET", "/v1/segmentations/{name}/versions/{version}/charts/{chart}.png"):
            (f"{base}/versions/1/charts/map.png", None, 200),
        ("GET", "/v1/segmentations/{name}/drift/charts/history.png"): (f"{base}/drift/charts/history.png", None, 200),
    }


def _route_table() -> dict[tuple[str, str], str | None]:
    """(method, path) -> the scope the route declares (None: none or several), read from a real app's routes."""
    with tempfile.TemporaryDirectory() as scratch:
        app = create_app(Settings(store_dir=Path(scratch) / "store"))
    table = {}
    # iter_route_contexts flattens included routers (with their prefixes), as FastAPI's OpenAPI builder does.
    for context in iter_route_contexts(app.routes):
        route = context.original_route
        if isinstance(route, APIRoute) and context.path.startswith("/v1"):
            declared = [getattr(d.call, "required_scope", None) for d in route.dependant.dependencies]
            declared = [scope for scope in declared if scope is not None]
            for method in context.methods:
                table[(method, context.path)] = declared[0] if len(declared) == 1 else None
    return table


ROUTES = _route_table()
CREDENTIALS = ["no-key", "unknown-key", *SCOPES]


def test_every_v1_route_declares_one_scope():
    assert ROUTES, "no /v1 routes found"
    undeclared = sorted(route for route, scope in ROUTES.items() if scope is None)
    assert not undeclared, f"routes without exactly one require_scope(...) dependency: {undeclared}"


def test_every_v1_route_has_a_matrix_example(iris):
    assert set(_examples(iris)) == set(ROUTES), "add the new route to _examples() in this file"


def _state(client, admin_key) -> object:
    """Everything a refused call must leave untouched: the segmentation with its versions and events."""
    return client.get(f"/v1/segmentations/{NAME}", headers=bearer(admin_key)).json()


@pytest.mark.parametrize("credential", CREDENTIALS)
@pytest.mark.parametrize("route", sorted(ROUTES), ids=lambda r: f"{r[0]} {r[1]}")
def test_authorization_matrix(secured, iris, route, credential):
    client, keys, job_id = secured
    path, body, normal_status = _examples(iris, job_id)[route]
    if credential == "no-key":
        headers = None
    elif credential == "unknown-key":
        headers = bearer(new_key())
    else:
        headers = bearer(keys[credential])
    required = ROUTES[route]
    if credential in ("no-key", "unknown-key"):
        expected = 401
    elif credential in (required, "admin"):
        expected = normal_status
    else:
        expected = 403
    before = _state(client, keys["admin"])
    response = client.request(route[0], path, json=body, headers=headers)
    assert response.status_code == expected, response.text
    if expected in (401, 403):
        assert response.json()["detail"]
        assert _state(client, keys["admin"]) == before          # a refusal writes nothing
        if expected == 401:
            assert response.headers["www-authenticate"] == "Bearer"
        else:
            assert required in response.json()["detail"]


@pytest.mark.parametrize("path", ["/healthz", "/readyz", "/metrics"])
def test_health_endpoints_need_no_key(secured, path):
    client, _, _ = secured
    assert client.get(path).status_code == 200


@pytest.mark.parametrize(
    "header",
    ["{key}", "Basic {key}", "Bearer ", "Bearer {prefix}" + "x" * 37, "bearer {key}x"],
    ids=["no-scheme", "wrong-scheme", "empty-key", "same-first-characters", "key-plus-a-character"],
)
def test_malformed_or_near_miss_keys_are_401(secured, header):
    client, keys, _ = secured
    key = keys["read"]
    value = header.format(key=key, prefix=key[:SHOWN_PREFIX])
    assert client.get("/v1/segmentations", headers={"Authorization": value}).status_code == 401
    assert client.get("/v1/segmentations", headers=bearer(key)).status_code == 200


def test_writes_record_the_key_name_as_actor(secured):
    client, keys, _ = secured
    assert client.put(f"/v1/segmentations/{NAME}/live", json={"version": 2},
                      headers=bearer(keys["fit"])).status_code == 200
    events = _state(client, keys["admin"])["events"]
    assert (events[0]["action"], events[0]["actor"], events[0]["version"]) == ("set_live", "key-fit", 2)


def test_a_revoked_key_is_refused_and_a_new_key_accepted_by_a_running_app(secured):
    client, keys, _ = secured
    assert client.get("/v1/segmentations", headers=bearer(keys["read"])).status_code == 200   # now remembered
    other_process_store = FilesystemStore(client.app.state.settings.store_dir)   # as `segscore keys` does
    other_process_store.revoke_key("key-read")
    fresh = other_process_store.create_key("late", ["read"])
    # The promise is "within 2 s": wait that long, then both changes must be in effect.
    time.sleep(KEYS_VISIBLE_WITHIN + 0.1)
    assert client.get("/v1/segmentations", headers=bearer(keys["read"])).status_code == 401
    assert client.get("/v1/segmentations", headers=bearer(fresh)).status_code == 200


def test_the_index_holds_no_key(template):
    root, keys, _ = template
    raw = (root / "index.sqlite3").read_bytes()
    for key in keys.values():
        assert key.encode() not in raw
    with sqlite3.connect(root / "index.sqlite3") as db:
        columns = [row[1] for row in db.execute("PRAGMA table_info(api_keys)")]
    assert set(columns) == {"name", "prefix", "salt", "digest", "scopes", "created_at", "created_by"}


# --------------------------------------------------------------------------- open mode and start-up
def test_without_keys_a_loopback_server_is_open_and_says_so(tmp_path, iris, caplog):
    with caplog.at_level(logging.WARNING, logger="segscore"):
        with TestClient(create_app(Settings(store_dir=tmp_path / "s"))) as client:
            response = client.post(f"/v1/segmentations/{NAME}/fit", json={"records": records_from(iris), "k": 2})
            assert response.status_code == 201
            detail = client.get(f"/v1/segmentations/{NAME}").json()
    assert "authentication is OFF" in caplog.text
    assert detail["versions"][0]["created_by"] == "local"
    assert detail["events"][0]["actor"] == "local"


@pytest.mark.parametrize("host", ["0.0.0.0", "10.1.2.3", "::"])
def test_without_keys_a_non_loopback_server_refuses_to_start(tmp_path, host):
    with pytest.raises(RuntimeError, match="segscore keys create"):
        with TestClient(create_app(Settings(store_dir=tmp_path / "s", host=host))):
            pass
    result = CliRunner().invoke(main, ["serve", "--host", host, "--store", str(tmp_path / "s")])
    assert result.exit_code == 1
    assert "segscore keys create --store" in result.output


def test_a_non_loopback_server_whose_keys_are_all_revoked_stays_closed(tmp_path):
    store = FilesystemStore(tmp_path / "s")
    key = store.create_key("only", ["admin"])
    with TestClient(create_app(Settings(store_dir=tmp_path / "s", host="0.0.0.0"))) as client:
        assert client.get("/v1/segmentations", headers=bearer(key)).status_code == 200
        store.revoke_key("only")
        client.app.state.keyring.refresh()
        assert client.get("/v1/segmentations").status_code == 401


def test_the_old_environment_variable_stops_the_server(tmp_path, monkeypatch):
    monkeypatch.setenv("SEGSCORE_API_KEYS", '{"some-long-key-0123456789": ["read"]}')
    with pytest.raises(RuntimeError, match="SEGSCORE_API_KEYS is no longer read"):
        with TestClient(create_app(Settings(store_dir=tmp_path / "s"))):
            pass


# --------------------------------------------------------------------------- the keys command
def run(*arguments: str):
    return CliRunner().invoke(main, list(arguments), catch_exceptions=False)


def test_keys_create_prints_the_key_alone_on_the_last_line_and_list_never_shows_it(tmp_path):
    store = str(tmp_path / "s")
    created = run("keys", "create", "--store", store, "--scope", "assign", "--scope", "read", "--name", "crm")
    assert created.exit_code == 0, created.output
    key = created.output.strip().splitlines()[-1]
    assert len(key) >= 40 and " " not in key
    listing = run("keys", "list", "--store", store)
    assert listing.exit_code == 0
    assert key not in listing.output
    assert key[SHOWN_PREFIX:SHOWN_PREFIX + 4] not in listing.output   # nothing past the first 6 characters
    name, scopes, created_at, starts = listing.output.strip().split("\t")
    assert (name, scopes, starts) == ("crm", "scopes=assign,read", f"starts={key[:SHOWN_PREFIX]}...")
    assert created_at.startswith("created=20")
    # the key works against an app on that store, with exactly those scopes
    with TestClient(create_app(Settings(store_dir=tmp_path / "s"))) as client:
        assert client.get("/v1/segmentations", headers=bearer(key)).status_code == 200
        assert client.post("/v1/segmentations/x/fit", json={"records": []}, headers=bearer(key)).status_code == 403


def test_keys_duplicate_name_and_unknown_revoke_exit_1(tmp_path):
    store = str(tmp_path / "s")
    assert run("keys", "create", "--store", store, "--scope", "read", "--name", "crm").exit_code == 0
    duplicate = CliRunner().invoke(main, ["keys", "create", "--store", store, "--scope", "fit", "--name", "crm"])
    assert duplicate.exit_code == 1 and "exists" in duplicate.output
    unknown = CliRunner().invoke(main, ["keys", "revoke", "--store", store, "--name", "nope"])
    assert unknown.exit_code == 1 and "nope" in unknown.output
    assert run("keys", "revoke", "--store", store, "--name", "crm").exit_code == 0
    assert run("keys", "list", "--store", store).output == ""
    shown = [json.loads(line) for line in run("events", "--store", store).output.splitlines()]
    assert [(e["action"], e["actor"], e["details"]["key"]) for e in shown] == [("revoke_key", "cli", "crm"),
                                                                              ("create_key", "cli", "crm")]


def test_keys_create_refuses_an_unknown_scope(tmp_path):
    result = CliRunner().invoke(main, ["keys", "create", "--store", str(tmp_path / "s"), "--scope", "root",
                                       "--name", "x"])
    assert result.exit_code == 2
