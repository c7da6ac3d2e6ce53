"""The live recorder's backlog on /metrics (issue 9, load): the bytes queued for the live counts and the
times an assign call had to tally the queue itself. References: the definition of the queued bytes (rows x
features x 8 bytes of float64 values) and the Prometheus text format (prometheus_client's own parser); the
bound itself is checked in tests/live/test_live_counts.py."""

from __future__ import annotations

from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from


def scraped(client, name: str) -> float:
    for family in text_string_to_metric_families(client.get("/metrics").text):
        for sample in family.samples:
            if sample.name == name:
                return sample.value
    raise AssertionError(f"{name} not exposed")


def test_live_queue_gauges_follow_the_backlog(tmp_path, iris):
    records = records_from(iris)
    with TestClient(create_app(Settings(store_dir=tmp_path / "s"))) as client:
        assert client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
        live = client.app.state.live
        live.stop()                 # no background tally from here on: what assign queues stays queued
        assert scraped(client, "segscore_live_queue_bytes") == 0
        assert client.post("/v1/segmentations/shop/assign", json={"records": records}).status_code == 200
        assert scraped(client, "segscore_live_queue_bytes") == len(records) * len(iris.feature_names) * 8
        assert scraped(client, "segscore_live_inline_tallies") == 0
        live.max_queued_bytes = 1   # the next batch passes the bound: the assign call tallies the queue itself
        assert client.post("/v1/segmentations/shop/assign", json={"records": records}).status_code == 200
        assert scraped(client, "segscore_live_queue_bytes") == 0
        assert scraped(client, "segscore_live_inline_tallies") == 1
