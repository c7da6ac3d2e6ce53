"""Large bodies (issue 9): records counted on the bytes before parsing, parsing off the event loop, and a bound
on large requests in flight. Small sizes and low limits keep the tests fast; the mechanism is the same."""

from __future__ import annotations

import json
import threading

import pytest
import sniffio
from fastapi.testclient import TestClient

import service.api.payload as payload
from service.app import create_app
from service.settings import Settings

FEATURES = ["a", "b"]


def _records(n: int) -> list[dict]:
    return [{"a": float(i % 17), "b": float(i % 5) + 0.5 * (i % 3)} for i in range(n)]


@pytest.mark.parametrize("document", [
    {"records": []},
    {"records": [{}]},
    {"records": [{}, {}, {}]},
    {"records": [1, "x,y", [1, 2, 3], {"a": [1, {"b": 2}]}, None]},
    {"records": [{"s": "brackets ] } [ { and , commas"}, {"s": "escaped \" quote, and \\\\"}, {"t": "\\\""}]},
    {"records": [{"a": 1}] * 7, "features": ["a"]},
    {"records": [{"k\"ey": ",,,"}, {"x": "\\"}]},
])
def test_count_matches_the_parsed_document(document):
    # Reference: Python's json module (json.dumps writes the body, json.loads' list lengths are the truth).
    body = json.dumps(document).encode()
    counted = payload.count_list_items_at_depth_two(body)
    records = len(json.loads(body)["records"])
    if list(document) == ["records"]:
        assert counted == max(1, records)       # exact (an empty list counts as one: an upper bound)
    else:                                       # other top-level lists add to the count: an upper bound
        assert records <= counted <= sum(len(v) for v in document.values())


def test_count_in_small_chunks_agrees(monkeypatch):
    # The scan carries its state (inside a string, depth) across chunk borders.
    body = json.dumps({"records": [{"s": "a,\"b\"]", "v": [1, 2]} for _ in range(40)]}).encode()
    whole = payload.count_list_items_at_depth_two(body)
    import service.inputs.checks as checks       # where the body scan lives (shared with the CLI)

    monkeypatch.setattr(checks, "_SCAN_CHUNK", 7)
    assert payload.count_list_items_at_depth_two(body) == whole == 40


def test_many_empty_records_are_refused_before_parsing(tmp_path, monkeypatch):
    # A few-MB cousin of the 90 MB body of 30 M empty objects: 413 from the byte count, no JSON parse at all.
    settings = Settings(store_dir=tmp_path / "s", max_assign_rows=1000, large_body_bytes=64 * 1024)
    with TestClient(create_app(settings)) as client:
        assert client.post("/v1/segmentations/x/fit", json={"records": _records(200), "k": 2}).status_code == 201
        parsed = []
        real_parse = payload.parse_json
        monkeypatch.setattr(payload, "parse_json", lambda body: parsed.append(len(body)) or real_parse(body))
        body = b'{"records": [' + b",".join([b"{}"] * 1_000_000) + b"]}"
        response = client.post("/v1/segmentations/x/assign", content=body, headers={"content-type": "application/json"})
        assert response.status_code == 413
        assert "1000000 records" in response.json()["detail"] and "limit is 1000" in response.json()["detail"]
        assert parsed == []
        # Within the limit, the same route parses and answers.
        ok = client.post("/v1/segmentations/x/assign", json={"records": _records(900)})
        assert ok.status_code == 200 and parsed


def test_large_bodies_are_parsed_in_a_worker_thread(tmp_path, monkeypatch):
    settings = Settings(store_dir=tmp_path / "s", large_body_bytes=1024)
    where = []

    def spying(name):
        real = getattr(payload, name)

        def spy(*args):
            try:
                where.append((name, sniffio.current_async_library()))
            except sniffio.AsyncLibraryNotFoundError:
                where.append((name, "worker thread"))
            return real(*args)
        return spy

    # A single plain record is read by the assign lane's shortcut, anything else by parse_batch.
    for name in ("parse_batch", "plain_single_record"):
        monkeypatch.setattr(payload, name, spying(name))
    with TestClient(create_app(settings)) as client:
        assert client.post("/v1/segmentations/x/fit", json={"records": _records(200), "k": 2}).status_code == 201
        assert client.post("/v1/segmentations/x/assign", json={"records": _records(1)}).status_code == 200
        assert client.post("/v1/segmentations/x/assign", json={"records": _records(300)}).status_code == 200
    assert where == [("plain_single_record", "asyncio"), ("parse_batch", "worker thread")]


def test_large_requests_in_flight_are_bounded(tmp_path, monkeypatch):
    # With large_body_concurrency = 1, a second large request waits until the first one has been parsed.
    settings = Settings(store_dir=tmp_path / "s", large_body_bytes=1024, large_body_concurrency=1)
    inside, release, entered = [], threading.Event(), threading.Event()
    real = payload.parse_batch

    def slow(*args):
        inside.append(1)
        entered.set()
        assert release.wait(30)
        inside.append(-1)
        return real(*args)

    with TestClient(create_app(settings)) as client:
        assert client.post("/v1/segmentations/x/fit", json={"records": _records(200), "k": 2}).status_code == 201
        monkeypatch.setattr(payload, "parse_batch", slow)
        results = []

        def post():
            results.append(client.post("/v1/segmentations/x/assign", json={"records": _records(300)}).status_code)

        threads = [threading.Thread(target=post) for _ in range(2)]
        threads[0].start()
        assert entered.wait(30)
        threads[1].start()
        threads[1].join(1.0)               # not a timing assertion: the second must not get in while we hold
        assert inside == [1]
        release.set()
        for thread in threads:
            thread.join(60)
        assert results == [200, 200] and inside == [1, -1, 1, -1]
