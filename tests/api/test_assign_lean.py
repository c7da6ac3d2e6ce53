"""The assign hot path (service/api/assign.py, LeanAssignRoute) against the documented FastAPI route.

The lean route answers requests whose query string is empty or plain ``version``/``on_error``; anything else is
handed to the FastAPI route. Each check below sends the same request both ways (a repeated parameter, e.g.
``?on_error=fail&on_error=fail``, is always handed over, and FastAPI reads the last value, so it asks the same
question) and requires the same status, body and headers that matter. Which route answered is recorded by
wrapping ``plain_query`` (it returns None exactly when the request is handed over). Reference data: the Iris
data set shipped with scikit-learn.
"""

from __future__ import annotations

import orjson
import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

import service.api.assign as assign_module
from service.app import create_app
from service.settings import Settings
from tests.conftest import create_keys, records_from

PATH = "/v1/segmentations/shop/assign"


@pytest.fixture
def seen(monkeypatch) -> list[str]:
    """'lean' or 'handed over', one entry per request that reached the lean route."""
    calls: list[str] = []
    original = assign_module.plain_query

    def recording(query: bytes):
        parsed = original(query)
        calls.append("handed over" if parsed is None else "lean")
        return parsed

    monkeypatch.setattr(assign_module, "plain_query", recording)
    return calls


@pytest.fixture
def shop(tmp_path, iris):
    settings = Settings(store_dir=tmp_path / "store")
    with TestClient(create_app(settings)) as client:
        body = {"records": records_from(iris, id_prefix="c"), "id_column": "id", "k": 3}
        assert client.post("/v1/segmentations/shop/fit", json=body).status_code == 201
    return settings


def post(client, body, query: str = "", headers: dict | None = None, content_type: str = "application/json"):
    content = body if isinstance(body, (bytes, str)) else orjson.dumps(body)
    return client.post(PATH + query, content=content, headers={"content-type": content_type, **(headers or {})})


def both_ways(client, seen, body, plain_query: str, handed_query: str, **kwargs):
    """The same request through the lean route and through the FastAPI route."""
    seen.clear()
    lean = post(client, body, plain_query, **kwargs)
    handed = post(client, body, handed_query, **kwargs)
    assert seen == ["lean", "handed over"]
    return lean, handed


def test_plain_query_tells_which_requests_the_lean_route_answers():
    assert assign_module.plain_query(b"") == (None, "fail")
    assert assign_module.plain_query(b"version=2&on_error=skip") == (2, "skip")
    assert assign_module.plain_query(b"on_error=fail") == (None, "fail")
    for handed in (b"verison=1", b"version=1&version=1", b"version=1.0", b"version=%2B1", b"version=0",
                   b"version=2147483648", b"on_error=maybe", b"version=", b"x"):
        assert assign_module.plain_query(handed) is None, handed


def test_answers_and_errors_are_the_same_on_both_routes(shop, seen, iris):
    records = records_from(iris, id_prefix="c")[:3]
    bad = [dict(records[0], **{iris.feature_names[0]: "12"}), records[1]]      # a numeric string is refused
    with TestClient(create_app(shop)) as client:
        cases = [
            ({"records": records[:1]}, "", "?on_error=fail&on_error=fail"),
            ({"records": records}, "?version=1", "?version=1&version=1"),
            ({"records": bad}, "", "?on_error=fail&on_error=fail"),                    # 422 naming the record
            ({"records": bad}, "?on_error=skip", "?on_error=skip&on_error=skip"),      # 200 with an error item
            (b"{not json", "", "?on_error=fail&on_error=fail"),                        # 400
            ({"records": []}, "", "?on_error=fail&on_error=fail"),                     # 422
            ({"records": records[:1]}, "?version=7", "?version=7&version=7"),          # 404 unknown version
        ]
        statuses = []
        for body, plain, handed in cases:
            lean, fastapi_route = both_ways(client, seen, body, plain, handed)
            assert lean.status_code == fastapi_route.status_code
            assert lean.json() == fastapi_route.json()
            assert lean.headers["content-type"] == fastapi_route.headers["content-type"]
            statuses.append(lean.status_code)
        assert statuses == [200, 200, 422, 200, 400, 422, 404]
        lean, fastapi_route = both_ways(client, seen, "a,b\n1,2\n", "", "?on_error=fail&on_error=fail",
                                        content_type="text/plain")
        assert lean.status_code == fastapi_route.status_code == 415
        assert lean.json() == fastapi_route.json()


def test_unknown_query_parameters_get_the_documented_422(shop, seen, iris):
    with TestClient(create_app(shop)) as client:
        response = post(client, {"records": records_from(iris)[:1]}, "?verison=1")
    assert seen == ["handed over"]
    assert response.status_code == 422
    assert "unknown query parameter" in response.json()["detail"][0]["message"]


def test_other_methods_are_answered_as_before(shop):
    with TestClient(create_app(shop)) as client:
        response = client.get(PATH)
    assert response.status_code == 405
    assert response.json() == {"detail": "Method Not Allowed"}


def test_keys_are_checked_the_same_way(shop, seen, iris):
    keys = create_keys(shop.store_dir, {"assigner": ["assign"], "reader": ["read"]})
    body = {"records": records_from(iris)[:1]}
    with TestClient(create_app(shop)) as client:
        for headers, status in (({}, 401), ({"authorization": "Bearer nope"}, 401),
                                ({"authorization": f"Bearer {keys['reader']}"}, 403),
                                ({"authorization": f"Bearer {keys['assigner']}"}, 200)):
            lean, handed = both_ways(client, seen, body, "", "?on_error=fail&on_error=fail", headers=headers)
            assert lean.status_code == handed.status_code == status
            assert lean.json() == handed.json()
            assert lean.headers.get("www-authenticate") == handed.headers.get("www-authenticate")


def test_request_id_and_metrics_on_the_lean_route(shop, seen, iris):
    with TestClient(create_app(shop)) as client:
        response = post(client, {"records": records_from(iris)[:2]}, headers={"x-request-id": "abc-123"})
        assert response.status_code == 200 and response.headers["x-request-id"] == "abc-123"
        assert post(client, {"records": []}).status_code == 422
        assert seen == ["lean", "lean"]
        families = {f.name: f for f in text_string_to_metric_families(client.get("/metrics").text)}
    requests = {(s.labels["route"], s.labels["status"]): s.value for s in families["segscore_http_requests"].samples
                if s.name.endswith("_total")}
    assert requests[("/v1/segmentations/{name}/assign", "200")] == 1
    assert requests[("/v1/segmentations/{name}/assign", "422")] == 1
    assigned = sum(s.value for s in families["segscore_records_assigned"].samples if s.name.endswith("_total"))
    assert assigned == 2


def test_the_lean_route_is_not_in_the_api_description(shop):
    with TestClient(create_app(shop)) as client:
        paths = client.get("/openapi.json").json()["paths"]
    assert list(paths["/v1/segmentations/{name}/assign"]) == ["post"]
    assert paths["/v1/segmentations/{name}/assign"]["post"]["operationId"].startswith("assign_records")
