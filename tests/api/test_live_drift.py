"""Issue 14: GET /v1/segmentations/{name}/drift/live through the HTTP app, on both store backends.

Reference for the figures: the batch drift report (POST .../drift) of the same records, whose statistics are
checked against SciPy in tests/core/test_drift.py: the live report must find the same shares on the same
bins. Data: a seeded Gaussian mixture from scikit-learn's ``make_blobs`` (the same model as test_drift.py).
"""

from __future__ import annotations

import math
import sqlite3
import struct
import time

import numpy as np
import pytest
from fastapi.testclient import TestClient

from schemas import DriftReport
from service.app import _refresh_live_gauges, create_app
from service.settings import Settings
from tests.api.test_drift import draw, records
from tests.api.test_metrics_families import samples
from tests.conftest import create_keys

NAME = "shoppers"


def fit(client) -> None:
    body = {"records": records(draw(1500, 1)), "k": 3, "components": 2}
    assert client.post(f"/v1/segmentations/{NAME}/fit", json=body).status_code == 201


def fresh(n: int, seed: int) -> np.ndarray:
    x = draw(n, seed)
    x[::17, 1] = np.nan                       # some missing values (imputed by assign, counted as missing)
    return x


def assign(client, x) -> None:
    answer = client.post(f"/v1/segmentations/{NAME}/assign", json={"records": records(x)})
    assert answer.status_code == 200, answer.text


def live(client, query="") -> dict:
    answer = client.get(f"/v1/segmentations/{NAME}/drift/live{query}")
    assert answer.status_code == 200, answer.text
    return answer.json()


def same_figures(live_report: dict, batch: dict) -> None:
    assert live_report["n_records"] == batch["n_records"] == live_report["live"]["n_records"]
    for got, want in zip(live_report["features"], batch["features"]):
        assert got["name"] == want["name"]
        assert got["psi"] == pytest.approx(want["psi"], rel=1e-12, abs=1e-15)
        assert got["n_observed"] == want["n_observed"]
        assert got["missing_share"] == pytest.approx(want["missing_share"], rel=1e-12)
    assert live_report["segments"]["observed_count"] == batch["segments"]["observed_count"]
    assert live_report["segments"]["psi"] == batch["segments"]["psi"]
    assert live_report["outliers"]["observed_count"] == batch["outliers"]["observed_count"]


def test_live_report_equals_the_batch_report_in_one_batch_one_by_one_and_through_two_apps(store_settings):
    x = fresh(240, 7)
    with TestClient(create_app(store_settings)) as a, TestClient(create_app(store_settings)) as b:
        fit(a)
        assign(a, x[:100])                                   # one batch, replica A
        for i in range(100, 140):
            assign(b, x[i:i + 1])                            # one by one, replica B
        assign(b, x[140:])
        b.app.state.live.flush()                             # B's periodic flush (A flushes when asked)
        batch = a.post(f"/v1/segmentations/{NAME}/drift", json={"records": records(x)}).json()
        report = live(a, "?window=1h")
        same_figures(report, batch)
        same_figures(live(b), batch)                          # B sees the same merged counts
        DriftReport.model_validate(report)
        assert report["live"]["window"] == "1h" and report["live"]["window_seconds"] == 3600
        assert {t["item"] for t in report["live"]["tests_changed"]} == {"features", "residual"}
        assert all(row["ks_statistic"] is None and row["test"].endswith("on bins") for row in report["features"])
        # Flushing again adds nothing: each record is counted once.
        a.app.state.live.flush()
        b.app.state.live.flush()
        assert live(a)["n_records"] == 240


def test_a_window_under_the_minimum_or_malformed_is_422_with_a_clear_message(settings):
    with TestClient(create_app(settings)) as client:
        fit(client)
        assign(client, fresh(20, 3))
        answer = client.get(f"/v1/segmentations/{NAME}/drift/live?window=30m")
        assert answer.status_code == 422
        message = answer.json()["detail"][0]["message"]
        assert "holds 20 assigned records" in message and "at least 50" in message
        for bad in ("1x", "0h", "-1h", "400d", ""):
            answer = client.get(f"/v1/segmentations/{NAME}/drift/live", params={"window": bad})
            assert answer.status_code == 422 and answer.json()["detail"][0]["field"] == "window", bad
        assert client.get("/v1/segmentations/nobody/drift/live").status_code == 404


def test_store_true_keeps_the_live_report_in_the_drift_history(settings):
    with TestClient(create_app(settings)) as client:
        fit(client)
        assign(client, fresh(80, 4))
        unstored = live(client)
        assert client.get(f"/v1/segmentations/{NAME}/drift").json()["reports"] == []
        stored = live(client, "?store=true")
        history = client.get(f"/v1/segmentations/{NAME}/drift").json()["reports"]
        assert [r["id"] for r in history] == [stored["id"]] and unstored["id"] != stored["id"]
        assert history[0]["live"]["n_records"] == 80


def test_live_drift_off_keeps_nothing_and_the_route_says_so(tmp_path):
    settings = Settings(store_dir=tmp_path / "store", live_drift=False)
    with TestClient(create_app(settings)) as client:
        fit(client)
        assign(client, fresh(80, 4))
        answer = client.get(f"/v1/segmentations/{NAME}/drift/live")
        assert answer.status_code == 404 and "SEGSCORE_LIVE_DRIFT=false" in answer.json()["detail"]
    with sqlite3.connect(tmp_path / "store" / "index.sqlite3") as db:
        assert db.execute("SELECT COUNT(*) FROM live_counts").fetchone()[0] == 0


def test_no_record_value_reaches_the_store(tmp_path):
    # Inspect what is written: every live_counts cell is an integer, and no assigned value appears in the
    # index file or its write-ahead log, neither as text nor as the 8 bytes of a float64 (either byte order).
    settings = Settings(store_dir=tmp_path / "store")
    x = draw(120, 11) + 0.123456789          # values that appear nowhere else
    with TestClient(create_app(settings)) as client:
        fit(client)
        assign(client, x)
        assert live(client)["n_records"] == 120
    index = tmp_path / "store" / "index.sqlite3"
    with sqlite3.connect(index) as db:
        rows = db.execute("SELECT name, version, bucket_start, bucket_seconds, slot, count FROM live_counts").fetchall()
        types = db.execute("SELECT DISTINCT typeof(version), typeof(bucket_start), typeof(bucket_seconds),"
                           " typeof(slot), typeof(count) FROM live_counts").fetchall()
    assert rows and types == [("integer",) * 5]
    assert sum(count for *_, slot, count in rows if slot == 0) == 120
    written = b"".join(path.read_bytes() for path in tmp_path.joinpath("store").glob("index.sqlite3*"))
    for value in x.ravel().tolist():
        for needle in (repr(value).encode(), struct.pack("<d", value), struct.pack(">d", value)):
            assert needle not in written


def test_live_drift_needs_the_drift_scope(tmp_path):
    settings = Settings(store_dir=tmp_path / "store")
    with TestClient(create_app(settings)) as client:
        fit(client)
    keys = create_keys(tmp_path / "store", {"tagger": ["assign"], "ops": ["drift"]})
    with TestClient(create_app(settings)) as client:
        path = f"/v1/segmentations/{NAME}/drift/live"
        assert client.get(path).status_code == 401
        assert client.get(path, headers={"Authorization": f"Bearer {keys['tagger']}"}).status_code == 403
        answer = client.get(path, headers={"Authorization": f"Bearer {keys['ops']}"})
        assert answer.status_code == 422      # allowed; no records in the window yet


def test_prometheus_gauges_show_the_live_figures(settings):
    # /metrics read with the Prometheus client's own text parser (prometheus_client.parser).
    with TestClient(create_app(settings)) as client:
        fit(client)
        x = draw(300, 5)
        x[:, 0] += 3.0                                 # a shifted feature: alert
        assign(client, x)
        report = live(client)
        _refresh_live_gauges(client.app)
        seen = samples(client)
    labels = (("segmentation", NAME), ("version", "1"))
    for row in report["features"]:
        key = ("segscore_live_feature_psi", tuple(sorted((*labels, ("feature", row["name"])))))
        assert seen[key] == pytest.approx(row["psi"], rel=1e-9)
    assert seen[("segscore_live_records", labels)] == 300
    assert seen[("segscore_live_outlier_rate", labels)] == pytest.approx(report["outliers"]["observed_rate"])
    assert seen[("segscore_live_segment_mix_psi", labels)] == pytest.approx(report["segments"]["psi"])
    assert report["status"] == "alert" and report["features"][0]["status"] == "alert"
    assert seen[("segscore_live_drift_status", labels)] == 2


def test_another_app_sees_the_counts_after_the_periodic_flush(tmp_path):
    # No explicit flush on A: its background loop flushes every live_flush_seconds. The deadline only guards
    # against a hang (no timed assertion).
    settings = Settings(store_dir=tmp_path / "store", live_flush_seconds=0.2)
    with TestClient(create_app(settings)) as a, TestClient(create_app(settings)) as b:
        fit(a)
        assign(a, fresh(60, 8))
        started = time.monotonic()
        while b.get(f"/v1/segmentations/{NAME}/drift/live").status_code != 200:
            assert time.monotonic() - started < 60, "A's counts never reached the store"
            time.sleep(0.1)
        assert live(b)["n_records"] == 60
        assert not math.isnan(live(b)["features"][0]["psi"])
