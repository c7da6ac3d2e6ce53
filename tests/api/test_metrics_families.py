"""/metrics read with the Prometheus client's own text parser: the counters move as requests are made."""

from __future__ import annotations

import numpy as np
import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from


def samples(client) -> dict[tuple[str, tuple], float]:
    found = {}
    for family in text_string_to_metric_families(client.get("/metrics").text):
        for sample in family.samples:
            found[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return found


def test_assign_drift_and_fit_metrics_move(tmp_path, iris):
    records = records_from(iris)
    with TestClient(create_app(Settings(store_dir=tmp_path / "s"))) as client:
        assert client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
        answer = client.post("/v1/segmentations/shop/assign", json={"records": records}).json()["results"]
        assert client.post("/v1/segmentations/shop/drift", json={"records": records}).status_code == 200
        seen = samples(client)
    counts = np.bincount([r["segment"] for r in answer], minlength=3)
    for segment, count in enumerate(counts.tolist()):
        key = ("segscore_records_assigned_total",
               (("segment", str(segment)), ("segmentation", "shop"), ("version", "1")))
        assert seen.get(key, 0.0) == count
    flagged = sum(r["outlier"] for r in answer)
    assert seen.get(("segscore_outliers_flagged_total", (("segmentation", "shop"),)), 0.0) == flagged
    assert seen[("segscore_fit_duration_seconds_count", ())] == 1
    assert seen[("segscore_bundles_loaded", ())] == 1
    assert seen[("segscore_drift_status", (("segmentation", "shop"),))] in (0, 1, 2)
    assert {labels for name, labels in seen if name == "segscore_drift_feature_psi"} == {
        (("feature", f), ("segmentation", "shop")) for f in iris.feature_names}
    assert seen[("segscore_store_errors_total", ())] == 0


def test_tallied_requests_expose_as_the_prometheus_objects_would():
    # Reference: prometheus_client's own Counter and Histogram (same names, labels and buckets) fed the same
    # requests one call at a time; the tallied Metrics must expose the same samples (creation times aside).
    from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest

    from service.metrics import LATENCY_BUCKETS, Metrics

    metrics = Metrics()
    assert metrics.tally is not None                 # one process: the tally is in use
    registry = CollectorRegistry()
    requests = Counter("segscore_http_requests", "", ["method", "route", "status"], registry=registry)
    latency = Histogram("segscore_http_request_seconds", "", ["route"], registry=registry, buckets=LATENCY_BUCKETS)
    assigned = Counter("segscore_records_assigned", "", ["segmentation", "version", "segment"], registry=registry)
    outliers = Counter("segscore_outliers_flagged", "", ["segmentation"], registry=registry)
    rng = np.random.default_rng(0)
    # Latencies on and around every bucket bound (a value equal to a bound belongs to that bound's bucket).
    elapsed = [*LATENCY_BUCKETS, *(b * 1.0001 for b in LATENCY_BUCKETS), *rng.exponential(0.01, 200), 100.0]
    routes = ["/v1/segmentations/{name}/assign", "/healthz"]
    for i, seconds in enumerate(elapsed):
        route, status = routes[i % 2], (200, 422, 401)[i % 3]
        metrics.request_done("POST", route, status, seconds, {}, False)
        requests.labels("POST", route, str(status)).inc()
        latency.labels(route).observe(seconds)
        segment, flagged = i % 4, i % 5 == 0
        metrics.count_assigned("shop", 1 + i % 2, [(segment, 1 + i % 3)], int(flagged))
        assigned.labels("shop", str(1 + i % 2), str(segment)).inc(1 + i % 3)
        if flagged:
            outliers.labels("shop").inc()
        if i == 50:
            metrics.exposition()                     # a scrape in between: counts are added once, not twice

    def without_created(text: bytes) -> dict:
        return {(s.name, tuple(sorted(s.labels.items()))): s.value
                for family in text_string_to_metric_families(text.decode()) for s in family.samples
                if not s.name.endswith("_created") and family.name in (
                    "segscore_http_requests", "segscore_http_request_seconds", "segscore_records_assigned",
                    "segscore_outliers_flagged")}

    ours, reference = without_created(metrics.exposition()), without_created(generate_latest(registry))
    assert ours.keys() == reference.keys()
    for key, value in reference.items():
        assert ours[key] == pytest.approx(value, rel=1e-12), key
