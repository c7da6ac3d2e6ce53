"""Benchmark (not a test): what authentication adds to one single-record assign request, in process.

Two apps on copies of one store holding segmentation 'bench' (Iris, k=3, fitted through the API): one with no
API key (loopback, authentication off), one whose store holds an 'assign' key that every request presents.
Each request is a direct ASGI call (no sockets, no HTTP parsing), so the difference is the key check alone:
BLAKE2b fingerprint + dict look-up for a remembered key. The two apps are called interleaved (one request of
each in turn, many rounds), so load from other processes hits both alike; medians are reported.

    python bench/bench_auth.py [--rounds 30] [--calls 300]
"""

from __future__ import annotations

import argparse
import asyncio
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import orjson
from fastapi.testclient import TestClient
from sklearn.datasets import load_iris

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.machine import cpu_model, load_average  # noqa: E402
from service.app import create_app  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store import FilesystemStore  # noqa: E402


def _records():
    iris = load_iris()
    return [dict(zip(iris.feature_names, map(float, row))) for row in iris.data]


def _call(app, body: bytes, headers: list[tuple[bytes, bytes]]):
    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
             "scheme": "http", "path": "/v1/segmentations/bench/assign", "raw_path": b"/v1/segmentations/bench/assign",
             "query_string": b"", "root_path": "", "server": ("127.0.0.1", 8000), "client": ("127.0.0.1", 5000),
             "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
                         *headers]}
    status = []

    async def receive():
        return {"type": "http.request", "body": body, "more_body": False}

    async def send(message):
        if message["type"] == "http.response.start":
            status.append(message["status"])

    async def run():
        await app(scope, receive, send)
        return status[0]

    return run


async def _time(run, calls: int) -> float:
    started = time.perf_counter()
    for _ in range(calls):
        assert await run() == 200
    return (time.perf_counter() - started) / calls


async def main_async(rounds: int, calls: int) -> None:
    root = Path(tempfile.mkdtemp())
    with TestClient(create_app(Settings(store_dir=root / "open"))) as client:
        response = client.post("/v1/segmentations/bench/fit", json={"records": _records(), "k": 3})
        assert response.status_code == 201
    shutil.copytree(root / "open", root / "keyed")
    key = FilesystemStore(root / "keyed").create_key("bench", ["assign"])
    open_app = create_app(Settings(store_dir=root / "open"))
    keyed_app = create_app(Settings(store_dir=root / "keyed"))
    body = orjson.dumps({"records": _records()[:1]})
    runs = {"auth off": _call(open_app, body, []),
            "auth on (remembered key)": _call(keyed_app, body, [(b"authorization", f"Bearer {key}".encode())])}
    refused = _call(keyed_app, body, [])
    assert await refused() == 401
    for run in runs.values():
        await _time(run, 50)                                 # warm-up: load and compile the version
    samples: dict[str, list[float]] = {name: [] for name in runs}
    for _ in range(rounds):
        for name, run in runs.items():
            samples[name].append(await _time(run, calls))
    print(f"machine: {cpu_model()}; load average {load_average()}; {rounds} rounds x {calls} calls")
    base = statistics.median(samples["auth off"])
    for name, values in samples.items():
        median = statistics.median(values)
        print(f"{name:28s} {median * 1e6:8.1f} us per request   ({(median - base) * 1e6:+.1f} us)")
    shutil.rmtree(root, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=30)
    parser.add_argument("--calls", type=int, default=300)
    args = parser.parse_args()
    asyncio.run(main_async(args.rounds, args.calls))


if __name__ == "__main__":
    main()
