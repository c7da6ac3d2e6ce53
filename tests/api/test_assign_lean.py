"""The assign hot path (service/api/assign.py, AssignLane) against the documented FastAPI route.

The assign lane, outside the app's middleware stack, answers requests whose query string is empty or plain
``version``/``on_error``; anything else is handed to the full app, where the FastAPI route answers. Each check below sends the same request both ways (a repeated parameter, e.g.
``?on_error=fail&on_error=fail``, is always handed over, and FastAPI reads the last value, so it asks the same
question) and requires the same status, body and headers that matter. Which route answered is recorded by
wrapping ``plain_query`` (it returns None exactly when the request is handed over). Reference data: the Iris
data set shipped with scikit-learn.
"""

from __future__ import annotations

import asyncio
import logging

import orjson
import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

import service.api.assign as assign_module
from service.app import create_app
from service.logs import RequestIdFilter
from service.settings import Settings
from tests.conftest import create_keys, records_from

PATH = "/v1/segmentations/shop/assign"


@pytest.fixture
def seen(monkeypatch) -> list[str]:
    """'lean' or 'handed over', one entry per request that reached the assign lane."""
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
    """The same request through the assign lane and through the FastAPI route."""
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
    first, second = iris.feature_names[:2]
    with_null = dict(records[0], **{first: None})                               # imputed, listed in "imputed"
    misspelt = {("x" + k if k == first else k): v for k, v in records[0].items()}   # absent, one edit away
    too_sparse = dict(records[0], **{name: None for name in iris.feature_names[:3]})
    with TestClient(create_app(shop)) as client:
        cases = [
            ({"records": records[:1]}, "", "?on_error=fail&on_error=fail"),
            ({"records": records}, "?version=1", "?version=1&version=1"),
            ({"records": bad}, "", "?on_error=fail&on_error=fail"),                    # 422 naming the record
            ({"records": bad}, "?on_error=skip", "?on_error=skip&on_error=skip"),      # 200 with an error item
            (b"{not json", "", "?on_error=fail&on_error=fail"),                        # 400
            ({"records": []}, "", "?on_error=fail&on_error=fail"),                     # 422
            ({"records": records[:1]}, "?version=7", "?version=7&version=7"),          # 404 unknown version
            ({"records": [with_null]}, "", "?on_error=fail&on_error=fail"),            # 200, one value imputed
            ({"records": [misspelt]}, "", "?on_error=fail&on_error=fail"),             # 422 naming the typo
            ({"records": [too_sparse]}, "", "?on_error=fail&on_error=fail"),           # 422: most values missing
            ({"records": [dict(records[0], id=True)]}, "", "?on_error=fail&on_error=fail"),   # 422: a bad id
            ({"records": records[:1], "k": 3}, "", "?on_error=fail&on_error=fail"),    # 422: unknown top-level key
        ]
        statuses = []
        for body, plain, handed in cases:
            lean, fastapi_route = both_ways(client, seen, body, plain, handed)
            assert lean.status_code == fastapi_route.status_code
            assert lean.json() == fastapi_route.json()
            assert lean.headers["content-type"] == fastapi_route.headers["content-type"]
            statuses.append(lean.status_code)
        assert statuses == [200, 200, 422, 200, 400, 422, 404, 200, 422, 422, 422, 422]
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


def test_request_id_and_metrics_on_the_lane(shop, seen, iris):
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


def test_the_lane_is_not_in_the_api_description(shop):
    with TestClient(create_app(shop)) as client:
        paths = client.get("/openapi.json").json()["paths"]
    assert list(paths["/v1/segmentations/{name}/assign"]) == ["post"]
    assert paths["/v1/segmentations/{name}/assign"]["post"]["operationId"].startswith("assign_records")


def _direct_call(app, path: str, body: bytes, receive_parts: list[bytes], declared: int | None = None,
                 gap: float = 0.0):
    """One request as a direct ASGI call: the body arrives as ``receive_parts``, each after the first ``gap``
    seconds after the one before (more to come after the last one when they add up to less than ``declared``:
    the client stops sending). Returns (status, headers, body)."""
    headers = [(b"content-type", b"application/json"), (b"x-request-id", b"slow-1")]
    if declared is not None:
        headers.append((b"content-length", str(declared).encode()))
    raw_path, _, query = path.partition("?")
    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST", "scheme": "http",
             "path": raw_path, "raw_path": raw_path.encode(), "query_string": query.encode(), "root_path": "",
             "server": ("127.0.0.1", 8000), "client": ("127.0.0.1", 5000), "headers": headers}
    parts = list(receive_parts)
    sent, sent_bytes = [], []

    async def receive():
        if parts:
            if gap and len(parts) < len(receive_parts):
                await asyncio.sleep(gap)
            part = parts.pop(0)
            sent_bytes.append(len(part))
            more = bool(parts) or (declared is not None and sum(sent_bytes) < declared)
            return {"type": "http.request", "body": part, "more_body": more}
        await asyncio.sleep(30)       # the client sends nothing more; the body time limit ends the wait
        raise AssertionError("the body time limit did not end the wait")

    async def send(message):
        sent.append(message)

    asyncio.run(asyncio.wait_for(app(scope, receive, send), 20))
    start, end = sent
    return start["status"], {k.decode(): v.decode() for k, v in start["headers"]}, end["body"]


def test_a_body_that_stops_arriving_is_the_same_408_on_both_routes(shop, seen, iris):
    """The lane times its own body reads: the same 408, detail and Connection: close as the middleware's."""
    body = orjson.dumps({"records": records_from(iris)[:1]})
    app = create_app(shop.model_copy(update={"body_read_timeout_seconds": 0.2}))
    answers = [_direct_call(app, PATH + query, body, [body[:10]], declared=len(body))
               for query in ("", "?on_error=fail&on_error=fail")]
    assert seen == ["lean", "handed over"]
    (lean_status, lean_headers, lean_body), (status, headers, handed_body) = answers
    assert lean_status == status == 408
    assert lean_body == handed_body and b"no part of the request body arrived" in lean_body
    assert lean_headers["connection"] == headers["connection"] == "close"
    assert lean_headers["x-request-id"] == headers["x-request-id"] == "slow-1"


def test_the_body_time_limit_is_per_part_on_both_routes(shop, seen, iris):
    """The limit bounds each wait for a part of the body, not the whole body: four parts 0.15 s apart under a
    0.3 s limit (0.45 s in all) are read, through the lane and through the middleware stack alike."""
    body = orjson.dumps({"records": records_from(iris)[:1]})
    app = create_app(shop.model_copy(update={"body_read_timeout_seconds": 0.3}))
    cut = [0, len(body) // 4, len(body) // 2, 3 * len(body) // 4, len(body)]
    parts = [body[a:b] for a, b in zip(cut, cut[1:])]
    answers = [_direct_call(app, PATH + query, body, parts, declared=len(body), gap=0.15)
               for query in ("", "?on_error=fail&on_error=fail")]
    assert seen == ["lean", "handed over"]
    (lean_status, _, lean_body), (status, _, handed_body) = answers
    assert lean_status == status == 200
    assert lean_body == handed_body


def test_body_size_limits_are_the_same_on_both_routes(shop, seen, iris):
    """413 for an announced body over max_body_bytes, and for a body that grows past it while it is read."""
    app = create_app(shop.model_copy(update={"max_body_bytes": 1024}))
    big = orjson.dumps({"records": records_from(iris)[:20]})
    assert len(big) > 1024
    for parts, declared in (([big], len(big)), ([big[:1000], big[1000:]], None)):
        answers = [_direct_call(app, PATH + query, big, parts, declared)
                   for query in ("", "?on_error=fail&on_error=fail")]
        (lean_status, _, lean_body), (status, _, handed_body) = answers
        assert lean_status == status == 413
        assert lean_body == handed_body
    assert seen == ["lean", "handed over"] * 2


def test_an_unexpected_error_is_the_same_plain_500_on_both_routes(shop, seen, iris, monkeypatch, caplog):
    """A bug in the scoring path (simulated): a JSON 500 without the exception's text, logged by type under the
    request id, as ErrorBoundary answers for every other route; the connection is not dropped (no re-raise)."""
    def broken(*args, **kwargs):
        raise RuntimeError("a record value that must not leak")

    for scoring in ("run_assignment", "score_one"):      # batches, and one record scored as Python numbers
        monkeypatch.setattr(assign_module, scoring, broken)
    caplog.handler.addFilter(RequestIdFilter())       # as the service's stderr handler: the id on every line
    with TestClient(create_app(shop), raise_server_exceptions=True) as client:
        with caplog.at_level(logging.ERROR, logger="segscore"):
            lean, handed = both_ways(client, seen, {"records": records_from(iris)[:1]}, "",
                                     "?on_error=fail&on_error=fail", headers={"x-request-id": "bug-1"})
    assert lean.status_code == handed.status_code == 500
    assert lean.json() == handed.json() and "must not leak" not in lean.text
    assert lean.headers["x-request-id"] == handed.headers["x-request-id"] == "bug-1"
    errors = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert [r.getMessage().split("\n")[0] for r in errors] == [f"unexpected RuntimeError on POST {PATH}"] * 2
    assert [r.request_id for r in errors] == ["bug-1"] * 2


async def _post_at_once(app, bodies: list[bytes]) -> list[tuple[int, dict, bytes]]:
    """Every body as a direct ASGI call, all started in the same turn of one event loop (as uvicorn starts the
    requests of connections that became readable together). Returns (status, headers, body) per call."""
    async def one(i: int, body: bytes):
        scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
                 "scheme": "http", "path": PATH, "raw_path": PATH.encode(), "query_string": b"", "root_path": "",
                 "server": ("127.0.0.1", 8000), "client": ("127.0.0.1", 5000),
                 "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
                             (b"x-request-id", f"at-once-{i}".encode())]}
        sent = []

        async def receive():
            return {"type": "http.request", "body": body, "more_body": False}

        async def send(message):
            sent.append(message)

        await app(scope, receive, send)
        start, end = sent
        return start["status"], {k.decode(): v.decode() for k, v in start["headers"]}, end["body"]

    return await asyncio.gather(*(one(i, body) for i, body in enumerate(bodies)))


def test_single_records_arriving_together_get_the_answers_they_get_alone(shop, iris, monkeypatch, caplog):
    """Single records that reach scoring in the same turn are scored back to back (service/api/turns.py; the
    turn's first at once, the others at the start of the next turn): each answer is byte for byte the one the
    record gets when sent alone, each request keeps its own id, and an error
    in one record's scoring (simulated) is that request's 500 only, logged under its own id."""
    records = records_from(iris, id_prefix="c")[::5]            # 30 records from every part of Iris
    bodies = [orjson.dumps({"records": [record]}) for record in records]
    waited: list[int] = []                  # per turn, the calls that waited for the next turn
    original_run = assign_module.TurnBatch._run

    def recording(turn):
        waited.append(len(turn.waiting))
        original_run(turn)

    monkeypatch.setattr(assign_module.TurnBatch, "_run", staticmethod(recording))
    app = create_app(shop)
    alone = [asyncio.run(_post_at_once(app, [body]))[0] for body in bodies]
    assert sum(waited) == 0                  # a lone request is scored at once
    waited.clear()
    together = asyncio.run(_post_at_once(app, bodies))
    assert sum(waited) == len(bodies) - 1    # all but the turn's first waited, and were scored back to back
    for i, ((status, headers, body), (status_alone, _, body_alone)) in enumerate(zip(together, alone)):
        assert status == status_alone == 200 and body == body_alone
        assert headers["x-request-id"] == f"at-once-{i}"

    original_score = assign_module.score_one
    broken_row = tuple(records[4][name] for name in iris.feature_names)

    def broken_for_one(loaded, row):
        if tuple(row) == broken_row:
            raise RuntimeError("a record value that must not leak")
        return original_score(loaded, row)

    monkeypatch.setattr(assign_module, "score_one", broken_for_one)
    caplog.handler.addFilter(RequestIdFilter())
    with caplog.at_level(logging.ERROR, logger="segscore"):
        together = asyncio.run(_post_at_once(app, bodies))
    assert [status for status, _, _ in together] == [500 if i == 4 else 200 for i in range(len(bodies))]
    assert all(body == body_alone for i, ((_, _, body), (_, _, body_alone)) in enumerate(zip(together, alone))
               if i != 4)
    errors = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert [r.request_id for r in errors] == ["at-once-4"]
