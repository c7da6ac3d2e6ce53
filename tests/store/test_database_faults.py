"""The postgres backend when the database becomes unreachable and comes back, on a running app.

The database is cut with a TCP relay between the service and PostgreSQL (tests/tcp_proxy.py: open connections
dropped, new ones refused), so the shared server keeps running for the other tests. Expected (README,
"Deployment"): assigns keep answering from memory, writes answer 503 with a detail that names the database,
/readyz says "unavailable", and everything recovers without a restart.
"""

from __future__ import annotations

import time
from urllib.parse import urlsplit, urlunsplit

import pytest
from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from
from tests.tcp_proxy import CuttableProxy

RECOVERY_DEADLINE = 60.0


@pytest.fixture
def proxied(postgres_url, tmp_path):
    parts = urlsplit(postgres_url)
    proxy = CuttableProxy(parts.hostname, parts.port or 5432)
    netloc = f"{parts.username + '@' if parts.username else ''}127.0.0.1:{proxy.port}"
    settings = Settings(store_backend="postgres", database_url=urlunsplit(parts._replace(netloc=netloc)),
                        store_dir=tmp_path / "artifacts", database_timeout_seconds=1.0)
    yield proxy, settings
    proxy.close()


def test_assign_answers_from_memory_writes_refuse_and_all_recovers(proxied, iris):
    proxy, settings = proxied
    records = records_from(iris)
    with TestClient(create_app(settings)) as client:
        assert client.post("/v1/segmentations/shop/fit", json={"records": records, "k": 3}).status_code == 201
        before = client.post("/v1/segmentations/shop/assign", json={"records": records}).json()
        assert client.get("/readyz").status_code == 200

        proxy.cut()
        for _ in range(20):
            during = client.post("/v1/segmentations/shop/assign", json={"records": records})
            assert during.status_code == 200 and during.json() == before
        refused = client.patch("/v1/segmentations/shop/versions/1/segments/0", json={"label": "x"})
        assert refused.status_code == 503
        assert "store database is unavailable" in refused.json()["detail"]
        assert client.put("/v1/segmentations/shop/live", json={"version": 1}).status_code == 503
        ready = client.get("/readyz")
        assert ready.status_code == 503 and ready.json()["status"] == "unavailable"

        proxy.restore()
        started = time.monotonic()
        while client.get("/readyz").status_code != 200:
            assert time.monotonic() - started < RECOVERY_DEADLINE, "no recovery after the database came back"
            time.sleep(0.2)
        labelled = client.patch("/v1/segmentations/shop/versions/1/segments/0", json={"label": "x"})
        assert labelled.status_code == 200
        answer = client.post("/v1/segmentations/shop/assign", json={"records": records}).json()
        assert {r["label"] for r in answer["results"] if r["segment"] == 0} == {"x"}
