"""JSON log lines (SEGSCORE_LOG_FORMAT=json): one object a line, with the request fields, never record values."""

from __future__ import annotations

import io
import json
import logging

from fastapi.testclient import TestClient

from service.app import create_app
from service.logs import JsonFormatter, RequestIdFilter
from service.settings import Settings
from tests.conftest import records_from


def test_every_request_is_one_json_line_without_record_values(tmp_path, iris):
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.addFilter(RequestIdFilter())
    handler.setFormatter(JsonFormatter())
    requests = logging.getLogger("segscore.requests")
    requests.addHandler(handler)
    requests.setLevel(logging.INFO)
    records = records_from(iris)
    try:
        with TestClient(create_app(Settings(store_dir=tmp_path / "s", access_log=True))) as client:
            assert client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
            marked = {name: 4.987654321 for name in records[0]}      # a value that appears nowhere else
            client.post("/v1/segmentations/shop/assign", json={"records": [marked]},
                        headers={"X-Request-ID": "req-42"})
    finally:
        requests.removeHandler(handler)
    lines = [json.loads(line) for line in stream.getvalue().splitlines()]
    assign = [line for line in lines if line["route"] == "/v1/segmentations/{name}/assign"]
    assert len(assign) == 1
    assert {k: assign[0][k] for k in ("method", "status", "segmentation", "request_id", "level")} == {
        "method": "POST", "status": 200, "segmentation": "shop", "request_id": "req-42", "level": "info"}
    assert assign[0]["duration_ms"] >= 0 and assign[0]["timestamp"].endswith("Z")
    # No record value reaches the log.
    assert "4.987654321" not in stream.getvalue()
