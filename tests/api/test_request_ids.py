"""Request ids, log lines and error bodies: no stack trace or record value leaves the service (issue: no leaks)."""

from __future__ import annotations

import logging
import re

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.logs import RequestIdFilter
from service.settings import Settings
from tests.conftest import records_from

MARKER = "Jane-Doe-4711"          # stands for a personal value inside a record
NEW_ID = re.compile(r"^[0-9a-f]{32}$")


class Collect(logging.Handler):
    """Keeps the records that pass the request-id filter (as the service's stderr handler sees them)."""

    def __init__(self) -> None:
        super().__init__(level=logging.DEBUG)
        self.addFilter(RequestIdFilter())
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)

    def text(self) -> str:
        return "\n".join(self.format(r) for r in self.records)


@pytest.fixture
def logs():
    handler = Collect()
    root = logging.getLogger()
    old_level = root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    yield handler
    root.removeHandler(handler)
    root.setLevel(old_level)


@pytest.fixture
def app_with_failures(tmp_path):
    """The real app plus two routes that fail unexpectedly (as a bug would), quoting a record value."""
    app = create_app(Settings(store_dir=tmp_path / "s"))

    @app.get("/test-only/fails-async")
    async def fails_async():
        raise RuntimeError(f"could not handle {MARKER}")

    @app.get("/test-only/fails-in-thread")
    def fails_in_thread():
        logging.getLogger("segscore").info("working in a thread")
        raise KeyError(MARKER)

    with TestClient(app) as client:
        yield client


@pytest.mark.parametrize("path", ["/healthz", "/readyz", "/metrics", "/openapi.json", "/v1/segmentations",
                                  "/v1/segmentations/nope", "/v1/segmentations/Bad!", "/nowhere"])
def test_every_response_carries_a_request_id(client, path):
    response = client.get(path)
    assert NEW_ID.match(response.headers["x-request-id"])
    assert client.get(path).headers["x-request-id"] != response.headers["x-request-id"]


def test_the_callers_id_is_echoed_when_it_is_safe(client):
    assert client.get("/healthz", headers={"X-Request-ID": "crm-2026.12.02:abc_1"}).headers["x-request-id"] \
        == "crm-2026.12.02:abc_1"


@pytest.mark.parametrize("sent", ["x" * 129, "has space", "<script>", "a;b", "ü"], ids=str)
def test_an_unsafe_caller_id_is_replaced(client, sent):
    returned = client.get("/healthz", headers={"X-Request-ID": sent.encode("utf-8")}).headers["x-request-id"]
    assert NEW_ID.match(returned)


@pytest.mark.parametrize("path", ["/test-only/fails-async", "/test-only/fails-in-thread"])
def test_an_unexpected_error_is_a_plain_500_logged_under_the_request_id(app_with_failures, logs, path):
    response = app_with_failures.get(path, headers={"X-Request-ID": "req-42"})
    assert response.status_code == 500
    assert response.headers["x-request-id"] == "req-42"
    assert set(response.json()) == {"detail"}
    assert "Traceback" not in response.text and "File " not in response.text and MARKER not in response.text
    mine = [r for r in logs.records if getattr(r, "request_id", None) == "req-42"]
    assert any(r.levelno == logging.ERROR for r in mine)
    if path.endswith("thread"):
        assert any(r.getMessage() == "working in a thread" for r in mine)   # the id crosses into the thread pool
    assert MARKER not in logs.text()                                        # the exception's message is not logged


def test_log_lines_outside_requests_have_a_placeholder_id(logs):
    logging.getLogger("segscore").warning("start-up message")
    assert logs.records[-1].request_id == "-"


def test_bad_requests_never_echo_record_values(client, iris, logs):
    """Every refusal names the record and the field, never the value (API.md: 422 with index and field)."""
    good = records_from(iris)
    assert client.post("/v1/segmentations/shop/fit", json={"records": good, "k": 2}).status_code == 201
    bad_string = [dict(good[0], **{"sepal length (cm)": MARKER})]
    cases = [
        ("post", "/v1/segmentations/shop/assign", {"json": {"records": bad_string}}),
        ("post", "/v1/segmentations/shop/assign", {"content": ('{"records": [{"a": "' + MARKER + '"').encode(),
                                                   "headers": {"content-type": "application/json"}}),
        ("post", "/v1/segmentations/shop/assign", {"content": f"sepal length (cm)\n{MARKER}\n".encode(),
                                                   "headers": {"content-type": "text/csv"}}),
        ("post", "/v1/segmentations/shop/drift", {"json": {"records": bad_string * 60}}),
        ("post", "/v1/segmentations/other/fit", {"json": {"records": good[:20] + bad_string, "k": 2}}),
        ("post", "/v1/segmentations/other/fit", {"json": {"records": good, "k": MARKER}}),
        ("put", "/v1/segmentations/shop/live", {"json": {"version": MARKER}}),
        ("patch", "/v1/segmentations/shop/versions/1/segments/0", {"json": {"label": 5, "x": MARKER}}),
    ]
    for method, path, kwargs in cases:
        response = getattr(client, method)(path, **kwargs)
        assert 400 <= response.status_code < 500, (path, response.status_code)
        assert response.json()["detail"]
        assert MARKER not in response.text, (path, response.text)
    assert MARKER not in logs.text()


def test_docs_can_be_turned_off(tmp_path):
    with TestClient(create_app(Settings(store_dir=tmp_path / "s", docs_enabled=False))) as client:
        for path in ("/docs", "/redoc", "/openapi.json"):
            assert client.get(path).status_code == 404
        assert client.get("/healthz").status_code == 200
