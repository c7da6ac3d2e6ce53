"""Connections against a real server process on loopback: keep-alive after a 500, slow bodies, idle
connections (issue: resource limits against a hostile client). Every wait is bounded."""

from __future__ import annotations

import socket
import sys
import time
from pathlib import Path

import httpx2
import pytest

from tests.serving import free_port, server_process

SOCKET_TIMEOUT = 15          # an upper bound for each wait below, never the expected time
REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    """A running server (one for this module): base URL, port, log. Body-read and keep-alive time-outs 1 s,
    header-read time-out 2 s, request heads up to 8 KB."""
    tmp_path = tmp_path_factory.mktemp("server")
    port = free_port()
    settings_env = dict(SEGSCORE_STORE_DIR=str(tmp_path / "store"), SEGSCORE_BODY_READ_TIMEOUT_SECONDS="1",
                        SEGSCORE_KEEP_ALIVE_SECONDS="1", SEGSCORE_HEADER_READ_TIMEOUT_SECONDS="2",
                        SEGSCORE_MAX_HEADER_BYTES="8192", PYTHONPATH=str(REPO))
    with server_process([sys.executable, "-m", "tests.server_child", str(port)], tmp_path,
                        settings_env=settings_env, cwd=REPO) as base:
        yield base, port, tmp_path / "server.log"


def _read_response(sock: socket.socket) -> tuple[int, dict[str, str], bytes]:
    """One HTTP/1.1 response with a Content-Length body, read from a raw socket."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = sock.recv(65536)
        assert chunk, f"connection closed before a full response head: {data!r}"
        data += chunk
    head, _, rest = data.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    headers = {k.strip().lower(): v.strip() for k, v in (line.split(":", 1) for line in lines[1:])}
    length = int(headers.get("content-length", "0"))
    while len(rest) < length:
        chunk = sock.recv(65536)
        assert chunk, "connection closed inside a response body"
        rest += chunk
    return status, headers, rest[:length]


def _closed_by_server(sock: socket.socket) -> bool:
    try:
        return sock.recv(1) == b""
    except ConnectionResetError:
        return True


def test_a_pooled_client_keeps_working_after_a_500(server):
    base, _, log = server
    with httpx2.Client(base_url=base, timeout=SOCKET_TIMEOUT,
                       limits=httpx2.Limits(max_connections=1, max_keepalive_connections=1)) as client:
        for _ in range(3):
            failed = client.get("/test-only/fails")
            assert failed.status_code == 500
            assert failed.json()["detail"] and "Traceback" not in failed.text
            assert client.get("/healthz").status_code == 200
            failed = client.post("/test-only/fails", content=b"x" * 50_000)
            assert failed.status_code == 500
            assert client.get("/v1/segmentations").status_code == 200
            failed = client.get("/test-only/fails-handled")
            assert failed.status_code == 500 and "SHA-256" in failed.json()["detail"]
            assert client.get("/healthz").status_code == 200
    assert "RuntimeError" in log.read_text()          # logged by type, with the request id


@pytest.mark.parametrize("path", ["/test-only/fails", "/test-only/fails-handled"], ids=["unexpected", "handled"])
def test_the_connection_itself_stays_open_after_a_500(server, path):
    """Raw socket: the same TCP connection answers a second request after the 500 (no silent close)."""
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(f"GET {path} HTTP/1.1\r\nHost: t\r\nX-Request-ID: first\r\n\r\n".encode())
        status, headers, _ = _read_response(sock)
        assert (status, headers["x-request-id"]) == (500, "first")
        assert headers.get("connection", "").lower() != "close"
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\n")
        status, _, body = _read_response(sock)
        assert (status, body) == (200, b'{"status":"ok"}')


def test_a_body_that_stops_arriving_is_answered_408_and_closed(server):
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(b"POST /v1/segmentations/shop/fit HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n"
                     b"Content-Length: 1000\r\n\r\n{\"records\": [")
        status, headers, body = _read_response(sock)     # the server's time-out is 1 s; we wait up to 15 s
        assert status == 408
        assert headers["connection"].lower() == "close"
        assert b"request body" in body
        assert _closed_by_server(sock)


def test_an_idle_kept_alive_connection_is_closed(server):
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\n")
        assert _read_response(sock)[0] == 200
        assert _closed_by_server(sock)                  # keep-alive time-out 1 s; we wait up to 15 s


def test_a_connection_that_sends_nothing_is_closed(server):
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        assert _closed_by_server(sock)                  # header time-out 2 s; we wait up to 15 s


def test_dripped_headers_are_cut_off(server):
    """One header byte every 0.2 s: the head is never complete within the 2 s limit, so the server closes."""
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\nX-Slow: ")
        deadline = time.monotonic() + SOCKET_TIMEOUT
        closed = False
        while not closed and time.monotonic() < deadline:
            try:
                sock.sendall(b"a")
            except (BrokenPipeError, ConnectionResetError):
                closed = True
                break
            sock.settimeout(0.2)
            try:
                closed = sock.recv(1) == b""
            except socket.timeout:
                pass
            except ConnectionResetError:
                closed = True
        assert closed, "the server kept a dripping connection open"


def test_the_head_time_limit_applies_to_each_request_on_a_kept_alive_connection(server):
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\n")
        assert _read_response(sock)[0] == 200
        sock.sendall(b"GET /healthz HTTP/1.1\r\n")          # begins a second request, never finishes it
        assert _closed_by_server(sock)


def test_an_oversized_request_head_is_refused(server):
    _, port, _ = server
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        try:
            sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\nX-Big: " + b"a" * 20_000 + b"\r\n\r\n")
        except (BrokenPipeError, ConnectionResetError):
            return
        assert _closed_by_server(sock)


def test_a_large_body_in_one_write_is_not_taken_for_a_large_head(server):
    """The head limit counts head bytes only: a small head and a 200 KB body sent in one write (so that one
    socket read holds both) reach the route, which reads the whole body and refuses its content."""
    _, port, _ = server
    body = b'{"records": [' + b" " * 200_000 + b']}'
    head = (f"POST /v1/segmentations/Bad!/fit HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\n\r\n").encode()
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(head + body)
        status, _, answer = _read_response(sock)
        assert status == 422 and b"name" in answer
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: t\r\n\r\n")          # and the connection lives on
        assert _read_response(sock)[0] == 200


def test_the_assign_lane_reads_a_body_in_parts_and_times_out_one_that_stops(server):
    """The assign lane reads its body itself (service/api/payload.py, receive_within): on a real server, a body
    whose second part comes 0.4 s after the first (under the 1 s limit) is read and answered; on the same
    kept-alive connection, a body that stops arriving is the same 408 with Connection: close as elsewhere.
    Reference data: the Iris data set shipped with scikit-learn."""
    import orjson
    from sklearn.datasets import load_iris

    base, port, _ = server
    iris = load_iris()
    records = [dict(zip(iris.feature_names, map(float, row))) for row in iris.data]
    fitted = httpx2.post(f"{base}/v1/segmentations/lane/fit", json={"records": records, "k": 3}, timeout=120)
    assert fitted.status_code == 201, fitted.text
    body = orjson.dumps({"records": records[:1]})
    head = (f"POST /v1/segmentations/lane/assign HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\n\r\n").encode()
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_TIMEOUT) as sock:
        sock.sendall(head + body[:10])
        time.sleep(0.4)
        sock.sendall(body[10:])
        status, _, answer = _read_response(sock)
        assert status == 200 and len(orjson.loads(answer)["results"]) == 1
        sock.sendall(head + body[:10])
        status, headers, answer = _read_response(sock)    # the server's time-out is 1 s; we wait up to 15 s
        assert status == 408 and headers["connection"].lower() == "close"
        assert b"request body" in answer
        assert _closed_by_server(sock)
