"""/metrics read with the Prometheus client's own text parser: the counters move as requests are made."""

from __future__ import annotations

import numpy as np
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
