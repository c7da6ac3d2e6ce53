"""API keys and scopes (API.md: 401 no or unknown key, 403 key lacks the scope; 'Authorization: Bearer <key>')."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from

FIT_KEY = "fit-key-0123456789abcdef"
READ_KEY = "read-key-0123456789abcdef"
ALL_KEY = "all-key-0123456789abcdef"


@pytest.fixture
def secured(tmp_path):
    settings = Settings(store_dir=tmp_path / "store",
                        api_keys={FIT_KEY: ["fit"], READ_KEY: ["read"], ALL_KEY: ["fit", "read", "assign", "drift"]})
    with TestClient(create_app(settings)) as client:
        yield client


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def _fit(client, iris, headers=None):
    return client.post("/v1/segmentations/shop/fit", json={"records": records_from(iris), "k": 2}, headers=headers)


@pytest.mark.parametrize(
    "headers",
    [None, bearer("not-a-known-key-at-all"), {"Authorization": FIT_KEY}, {"Authorization": f"Basic {FIT_KEY}"},
     {"Authorization": "Bearer "}],
    ids=["no-header", "unknown-key", "no-scheme", "wrong-scheme", "empty-key"],
)
def test_fit_without_a_valid_key_is_401_and_writes_nothing(secured, iris, headers):
    response = _fit(secured, iris, headers)
    assert response.status_code == 401
    assert response.headers["www-authenticate"] == "Bearer"
    assert response.json()["detail"]
    assert secured.get("/v1/segmentations", headers=bearer(READ_KEY)).json() == {"segmentations": []}


def test_fit_with_a_read_only_key_is_403(secured, iris):
    response = _fit(secured, iris, bearer(READ_KEY))
    assert response.status_code == 403
    assert "fit" in response.json()["detail"]
    assert secured.get("/v1/segmentations", headers=bearer(READ_KEY)).json() == {"segmentations": []}


def test_fit_with_the_fit_scope_is_201(secured, iris):
    assert _fit(secured, iris, bearer(FIT_KEY)).status_code == 201


def test_reads_need_the_read_scope(secured, iris):
    _fit(secured, iris, bearer(FIT_KEY))
    for path in ("/v1/segmentations", "/v1/segmentations/shop", "/v1/segmentations/shop/versions/1"):
        assert secured.get(path).status_code == 401
        assert secured.get(path, headers=bearer(FIT_KEY)).status_code == 403
        assert secured.get(path, headers=bearer(READ_KEY)).status_code == 200
        assert secured.get(path, headers=bearer(ALL_KEY)).status_code == 200


def test_live_and_label_need_the_fit_scope(secured, iris):
    _fit(secured, iris, bearer(FIT_KEY))
    _fit(secured, iris, bearer(FIT_KEY))
    live = ("put", "/v1/segmentations/shop/live", {"version": 2})
    label = ("patch", "/v1/segmentations/shop/versions/1/segments/0", {"label": "x"})
    for method, path, body in (live, label):
        call = getattr(secured, method)
        assert call(path, json=body).status_code == 401
        assert call(path, json=body, headers=bearer(READ_KEY)).status_code == 403
        assert call(path, json=body, headers=bearer(FIT_KEY)).status_code == 200
    assert secured.get("/v1/segmentations/shop", headers=bearer(READ_KEY)).json()["live_version"] == 2


@pytest.mark.parametrize("path", ["/healthz", "/readyz", "/metrics"])
def test_health_endpoints_need_no_key(secured, path):
    assert secured.get(path).status_code == 200


def test_auth_is_off_without_keys(client, iris):
    assert _fit(client, iris).status_code == 201
    assert client.get("/v1/segmentations").status_code == 200


@pytest.mark.parametrize("keys", [{"short": ["fit"]}, {"a-long-enough-key-123": ["admin"]}], ids=["short-key", "bad-scope"])
def test_unsafe_key_settings_are_refused_at_start_up(tmp_path, keys):
    with pytest.raises(ValidationError):
        Settings(store_dir=tmp_path, api_keys=keys)
